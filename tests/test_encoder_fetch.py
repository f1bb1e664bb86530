"""auto gets clip when it can: download once (progress, verified, stored), else bundled fast.

The hub is a local HTTP server on 127.0.0.1 that answers the way the Hugging
Face hub does for ``/{repo}/resolve/{revision}/{file}`` (HEAD and GET with
``X-Repo-Commit``, ``ETag`` = the file's sha256 for LFS files, and
``Content-Length``; huggingface_hub docs, "File metadata" and
``get_hf_file_metadata``), serving a random-weight checkpoint in open_clip's
hub layout (``open_clip_model.safetensors``, the name open_clip's
``download_pretrained_from_hf`` tries first). Every run gets its own HF_HOME,
HOME and cache folders, so nothing touches the shared ~/.cache.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")
open_clip = pytest.importorskip("open_clip")

from explore.encoders import load_encoder  # noqa: E402
from explore.encoders.fetch import weight_files  # noqa: E402
from explore.study import DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
COMMIT = "0123456789abcdef0123456789abcdef01234567"


class FakeHub:
    """A minimal hub: {"/repo/resolve/main/file": bytes}; counts requests; can lie about the sha256."""

    def __init__(self, files: dict[str, bytes], wrong_hash: bool = False):
        self.files = files
        self.requests: list[str] = []
        self.wrong_hash = wrong_hash
        hub = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args):
                pass

            def _answer(self, body: bool):
                hub.requests.append(f"{self.command} {self.path}")
                path = self.path.split("?")[0]
                for revision in ("main", COMMIT):
                    path = path.replace(f"/resolve/{revision}/", "/resolve/main/")
                data = hub.files.get(path)
                if data is None:
                    self.send_response(404)
                    self.send_header("X-Error-Code", "EntryNotFound")
                    self.send_header("X-Repo-Commit", COMMIT)
                    self.send_header("Content-Length", "0")
                    self.end_headers()
                    return
                sha = hashlib.sha256(data).hexdigest()
                if hub.wrong_hash:
                    sha = hashlib.sha256(b"something else").hexdigest()
                self.send_response(200)
                self.send_header("X-Repo-Commit", COMMIT)
                self.send_header("ETag", f'"{sha}"')
                self.send_header("Content-Length", str(len(data)))
                self.send_header("Content-Type", "application/octet-stream")
                self.end_headers()
                if body:
                    for start in range(0, len(data), 1 << 20):
                        self.wfile.write(data[start : start + (1 << 20)])

            def do_HEAD(self):
                self._answer(body=False)

            def do_GET(self):
                self._answer(body=True)

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture(scope="module")
def default_checkpoint():
    """The default model with random weights, as safetensors bytes, plus the model itself."""
    from safetensors.torch import save

    torch.manual_seed(0)
    model, _, preprocess = open_clip.create_model_and_transforms(DEFAULT_CLIP_MODEL, pretrained=None)
    model.eval()
    state = {k: v.contiguous() for k, v in model.state_dict().items()}
    return save(state), model, preprocess


def _env(tmp_path: Path, **extra) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("HF_", "HUGGINGFACE_", "EXPLORE_CLIP", "TRANSFORMERS_"))}
    home = tmp_path / "home"
    env.update(
        HOME=str(home),
        XDG_CACHE_HOME=str(home / ".cache"),
        HF_HOME=str(home / ".cache" / "huggingface"),
        PYTHONPATH=str(ROOT),
    )
    # the bundled encoder's label cache stays shared (EXPLORE_MODEL_CACHE), as in the other tests
    env.update(extra)
    return env


RUN_AUTO = """
import sys
import numpy as np
from explore.encoders import load_encoder
encoder, notice = load_encoder("auto")
print("FAMILY", encoder.family)
print("NOTICE", notice)
print("ID", encoder.id)
if encoder.family == "clip":
    np.save(sys.argv[1], encoder.encode_texts(["a photo of a cat", "a sunny beach"]))
"""


def _run(env, out: Path):
    return subprocess.run(
        [sys.executable, "-c", RUN_AUTO, str(out)], env=env, capture_output=True, text=True, timeout=600, cwd=ROOT
    )


def _lines(stdout: str) -> dict:
    return {line.split(" ", 1)[0]: line.split(" ", 1)[1] for line in stdout.splitlines() if " " in line}


def test_auto_downloads_verifies_stores_then_reuses_the_cache(tmp_path, default_checkpoint):
    data, model, _ = default_checkpoint
    repo_id, names = weight_files(DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED)
    assert names[0] == "open_clip_model.safetensors"  # open_clip's preferred name
    with FakeHub({f"/{repo_id}/resolve/main/{names[0]}": data}) as hub:
        env = _env(tmp_path, HF_ENDPOINT=hub.url)
        first = _run(env, tmp_path / "first.npy")
        assert first.returncode == 0, first.stderr[-3000:]
        out = _lines(first.stdout)
        assert out["FAMILY"] == "clip", first.stdout
        # downloaded, verified, and says where it is stored (inside this run's HF_HOME)
        assert "downloaded" in out["NOTICE"] and "sha256" in out["NOTICE"] and "checked" in out["NOTICE"]
        assert str(tmp_path / "home" / ".cache" / "huggingface" / "hub") in out["NOTICE"]
        # the progress bar: bytes done / total, elapsed<remaining, rate (tqdm's format)
        bar = first.stderr
        assert "100%" in bar and "MB/" in bar and "B/s]" in bar and "<" in bar, bar[-2000:]
        assert any(r.startswith("GET ") for r in hub.requests)
        stored = list((tmp_path / "home" / ".cache" / "huggingface" / "hub").rglob(names[0]))
        assert stored and hashlib.sha256(stored[0].read_bytes()).hexdigest() == hashlib.sha256(data).hexdigest()

        # Second run (in this process, same HF_HOME): found in the cache, no
        # request at all reaches the hub.
        seen = len(hub.requests)
        with pytest.MonkeyPatch.context() as mp:
            for key, value in env.items():
                if key in ("HOME", "XDG_CACHE_HOME", "HF_HOME", "HF_ENDPOINT"):
                    mp.setenv(key, value)
            for key in ("HF_HUB_CACHE", "HUGGINGFACE_HUB_CACHE", "EXPLORE_CLIP_WEIGHTS", "HF_HUB_OFFLINE"):
                mp.delenv(key, raising=False)
            encoder, notice = load_encoder("auto")
        assert encoder.family == "clip" and "weights found at" in notice and str(stored[0].parent) in notice
        assert len(hub.requests) == seen, hub.requests[seen:]
        assert encoder.id == out["ID"]
        second = encoder.encode_texts(["a photo of a cat", "a sunny beach"])

    # The loaded weights are the served ones: text vectors equal open_clip's own
    # encode_text on the random model (open_clip tokenizer, L2-normalised).
    with torch.no_grad():
        ref = model.encode_text(open_clip.get_tokenizer(DEFAULT_CLIP_MODEL)(["a photo of a cat", "a sunny beach"]))
        ref = (ref / ref.norm(dim=-1, keepdim=True)).numpy()
    np.testing.assert_allclose(np.load(tmp_path / "first.npy"), ref, atol=1e-5)
    np.testing.assert_allclose(second, ref, atol=1e-5)


FETCH = """
import sys
from explore.encoders.base import EncoderUnavailable
from explore.encoders.fetch import fetch_weights
try:
    print("FETCHED", fetch_weights(sys.argv[1], sys.argv[2], progress=None).describe())
except EncoderUnavailable as exc:
    print("ERROR", exc)
"""


@pytest.mark.parametrize("wrong_hash", [False, True])
def test_fetch_checks_the_published_sha256_and_deletes_a_bad_file(tmp_path, wrong_hash):
    # 3 MB of random bytes stand in for the checkpoint: verification does not read it as a model.
    data = np.random.default_rng(0).bytes(3_000_000)
    repo_id, names = weight_files(DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED)
    with FakeHub({f"/{repo_id}/resolve/main/{names[0]}": data}, wrong_hash=wrong_hash) as hub:
        result = subprocess.run(
            [sys.executable, "-c", FETCH, DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED],
            env=_env(tmp_path, HF_ENDPOINT=hub.url), capture_output=True, text=True, timeout=300, cwd=ROOT,
        )
    assert result.returncode == 0, result.stderr[-3000:]
    out = _lines(result.stdout)
    stored = list((tmp_path / "home" / ".cache" / "huggingface" / "hub").rglob(names[0]))
    if wrong_hash:
        assert "failed verification" in out["ERROR"] and "sha256" in out["ERROR"] and "deleted" in out["ERROR"]
        assert not stored
    else:
        assert "size and sha256 checked" in out["FETCHED"], out
        assert len(stored) == 1 and stored[0].read_bytes() == data


def _closed_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.parametrize(
    "env, why",
    [
        ({"HF_HUB_OFFLINE": "1"}, "HF_HUB_OFFLINE is set"),
        ({"HF_ENDPOINT": "closed"}, "did not answer"),  # connection refused
        # RFC 5737 TEST-NET-1: never routed, so the probe waits for its timeout
        ({"HF_ENDPOINT": "http://192.0.2.1"}, "did not answer"),
    ],
)
def test_auto_offline_falls_back_within_5_seconds_with_notice(tmp_path, monkeypatch, env, why):
    # The whole fallback, building the bundled encoder included: its models load on first
    # use, so the time is the decision (the probe's 3 s at most) plus reading two digests.
    for key in [k for k in os.environ if k.startswith(("HF_", "HUGGINGFACE_")) or k == "EXPLORE_CLIP_WEIGHTS"]:
        monkeypatch.delenv(key)
    monkeypatch.setenv("HOME", str(tmp_path))
    monkeypatch.setenv("HF_HOME", str(tmp_path / "hf"))
    for key, value in env.items():
        monkeypatch.setenv(key, f"http://127.0.0.1:{_closed_port()}" if value == "closed" else value)
    start = time.monotonic()
    encoder, notice = load_encoder("auto")
    elapsed = time.monotonic() - start
    assert encoder.family == "bundled"
    assert elapsed < 5, f"took {elapsed:.1f} s"
    assert why in notice and "explore fetch-model" in notice and DEFAULT_CLIP_MODEL in notice


def test_fetch_model_command_names_the_file_to_carry_and_how_to_use_it(tmp_path):
    data = np.random.default_rng(1).bytes(2_000_000)
    repo_id, names = weight_files("ViT-B-32", "datacomp_xl_s13b_b90k")
    carry = tmp_path / "usb"
    with FakeHub({f"/{repo_id}/resolve/main/{names[0]}": data}) as hub:
        result = subprocess.run(
            [sys.executable, "-m", "explore.cli", "fetch-model", "ViT-B-32/datacomp_xl_s13b_b90k", "--to", str(carry)],
            env=_env(tmp_path, HF_ENDPOINT=hub.url), capture_output=True, text=True, timeout=300, cwd=ROOT,
        )
    assert result.returncode == 0, result.stderr[-3000:]
    copied = carry / "ViT-B-32-datacomp_xl_s13b_b90k.safetensors"
    assert copied.read_bytes() == data
    out = result.stdout
    assert "stored and verified" in out and "size and sha256 checked" in out
    assert f"The file to copy to an offline machine: {copied}" in out
    assert 'model = "ViT-B-32"' in out and 'pretrained = "datacomp_xl_s13b_b90k"' in out and "weights = " in out
    assert "EXPLORE_CLIP_WEIGHTS" in out
    assert "B/s]" in result.stderr  # the progress bar
