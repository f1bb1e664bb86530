"""Models are loaded only when something must be embedded.

- The text-vector cache (explore/encoders/text_cache.py): a text is embedded
  once per encoder, alone (so its vector never depends on its batch), and read
  back bit for bit, in this process and in the next.
- A re-run whose image vectors and prompts are all cached loads no model and
  imports neither torch nor the model libraries (a real second process), and
  its tables equal the first run's exactly.
- `explore embed` on a fully cached folder loads no model either.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from explore.encoders import text_cache

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).parent))
from fault_kit import make_tiny_study  # noqa: E402


class CountingEncode:
    """A stand-in text model: a fixed random vector per text, and a record of every call."""

    def __init__(self, dim: int = 8):
        self.dim, self.calls = dim, []

    def __call__(self, texts):
        self.calls.append(list(texts))
        rows = [np.random.default_rng(abs(hash(t)) % 2**32).normal(size=self.dim) for t in texts]
        return np.asarray(rows, dtype=np.float32)


@pytest.fixture
def model_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("EXPLORE_MODEL_CACHE", str(tmp_path / "models"))
    monkeypatch.setattr(text_cache, "_MEMORY", {})
    return tmp_path / "models"


def test_each_text_is_embedded_once_and_alone(model_cache):
    encode = CountingEncode()
    first = text_cache.encode_texts_cached("enc-a", ["sunny", "rainy", "sunny"], encode, 8)
    assert encode.calls == [["sunny"], ["rainy"]]  # one call per new text, each text alone
    assert first.shape == (3, 8) and first.dtype == np.float32
    np.testing.assert_array_equal(first[0], first[2])
    again = text_cache.encode_texts_cached("enc-a", ["rainy", "sunny", "snowy"], encode, 8)
    assert encode.calls[2:] == [["snowy"]]
    np.testing.assert_array_equal(again[:2], first[[1, 0]])
    assert text_cache.encode_texts_cached("enc-a", [], encode, 8).shape == (0, 8)


def test_the_next_process_reads_the_vectors_from_disk(model_cache, monkeypatch):
    encode = CountingEncode()
    first = text_cache.encode_texts_cached("enc-a", ["sunny", "rainy"], encode, 8)
    monkeypatch.setattr(text_cache, "_MEMORY", {})  # as a new process starts
    later = CountingEncode()
    np.testing.assert_array_equal(text_cache.encode_texts_cached("enc-a", ["rainy", "sunny"], later, 8), first[::-1])
    assert later.calls == []
    # another encoder id never reads them
    other = CountingEncode()
    text_cache.encode_texts_cached("enc-b", ["sunny"], other, 8)
    assert other.calls == [["sunny"]]


def test_a_damaged_cache_file_is_rebuilt(model_cache, monkeypatch):
    encode = CountingEncode()
    first = text_cache.encode_texts_cached("enc-a", ["sunny"], encode, 8)
    path = text_cache.cache_path("enc-a")
    path.write_bytes(b"not a numpy file")
    monkeypatch.setattr(text_cache, "_MEMORY", {})
    again = CountingEncode()
    np.testing.assert_array_equal(text_cache.encode_texts_cached("enc-a", ["sunny"], again, 8), first)
    assert again.calls == [["sunny"]]
    monkeypatch.setattr(text_cache, "_MEMORY", {})
    assert text_cache._read(path, "enc-a").keys() == {"sunny"}  # rewritten whole


def test_entries_of_another_process_are_kept(model_cache, monkeypatch):
    # two processes embedding different texts: the second write keeps the first's entries
    text_cache.encode_texts_cached("enc-a", ["sunny"], CountingEncode(), 8)
    monkeypatch.setattr(text_cache, "_MEMORY", {"enc-a": {}})  # a process that started before the write
    text_cache.encode_texts_cached("enc-a", ["rainy"], CountingEncode(), 8)
    assert set(text_cache._read(text_cache.cache_path("enc-a"), "enc-a")) == {"sunny", "rainy"}


def test_bundled_text_vectors_do_not_depend_on_their_batch():
    # all-MiniLM-L6-v2 pads a batch to its longest text; a text embedded alone
    # (as the cache does) must equal sentence-transformers' own single encoding.
    from sentence_transformers import SentenceTransformer

    from explore.encoders.bundled import BundledEncoder, text_model_dir

    encoder = BundledEncoder()
    texts = ["a quiet breakfast at home", "a crowded night party with loud music and dancing"]
    ours = encoder.encode_texts(texts)
    reference = SentenceTransformer(str(text_model_dir()), device="cpu", local_files_only=True)
    for text, row in zip(texts, ours):
        alone = reference.encode([text], normalize_embeddings=True, convert_to_numpy=True)[0]
        np.testing.assert_allclose(row, alone, atol=1e-6)


CHILD = """
import json, sys, time
start = time.perf_counter()
from explore.study import load_study
from explore.run import run_study
summary = run_study(load_study(sys.argv[1]), progress=False, log=lambda line: None)
from explore.encoders import bundled
print(json.dumps({
    "embedded": summary.images_embedded,
    "models": sorted(bundled._MODELS),
    "modules": sorted(m for m in ("torch", "timm", "sentence_transformers", "open_clip") if m in sys.modules),
    "stage_seconds": summary.stage_seconds,
    "seconds": time.perf_counter() - start,
}))
"""


def _run_child(study: Path, models: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(REPO), HF_HUB_OFFLINE="1", EXPLORE_MODEL_CACHE=str(models))
    done = subprocess.run([sys.executable, "-c", CHILD, str(study)], env=env, capture_output=True, text=True,
                          timeout=900, cwd=REPO)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


#: Brand folders named like spreadsheet formulas: every CSV the run writes must guard them.
HOSTILE_BRANDS = ("=SUM(A1)", "@Beta")
TABLES_COMPARED = ("image_attributes", "attribute_shares", "image_contexts", "contexts", "findings")


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    """The tiny study run twice in fresh processes with an empty model cache at first."""
    folder = tmp_path_factory.mktemp("lazy")
    study = make_tiny_study(folder, per_cell=4, brands=HOSTILE_BRANDS)
    first = _run_child(study, folder / "models")  # an empty model cache: every prompt is new
    tables = {name: pd.read_parquet(folder / "out" / f"{name}.parquet") for name in TABLES_COMPARED}
    second = _run_child(study, folder / "models")
    return first, second, tables, folder / "out"


def test_a_fully_cached_rerun_loads_no_model(two_runs):
    first, second, _, _ = two_runs
    assert first["embedded"] == 16 and first["models"] == ["image", "text"]
    assert second["embedded"] == 0
    assert second["models"] == [], "a fully cached re-run loaded a model"
    assert second["modules"] == [], f"a fully cached re-run imported {second['modules']}"
    print(f"\nfirst run {first['seconds']:.1f} s, fully cached re-run {second['seconds']:.1f} s "
          f"(stages {second['stage_seconds']})")


def test_the_cached_rerun_gives_the_same_tables(two_runs):
    _, _, tables, out = two_runs
    for name, table in tables.items():
        again = pd.read_parquet(out / f"{name}.parquet")
        pd.testing.assert_frame_equal(again, table, check_exact=True)


def test_every_csv_written_guards_formula_cells(two_runs):
    # OWASP "CSV Injection": no text cell of any CSV of the output folder may start with
    # = + - @ tab or CR (numbers aside); the brand names above would otherwise run.
    import csv

    _, _, _, out = two_runs
    files = sorted(out.glob("*.csv"))
    assert {"images.csv", "attribute_shares.csv", "findings.csv", "brand_contexts.csv"} <= {f.name for f in files}
    seen_brand = False
    for path in files:
        with open(path, newline="", encoding="utf-8") as fh:
            for row in csv.reader(fh):
                for cell in row:
                    seen_brand |= cell == "'" + HOSTILE_BRANDS[0]
                    if cell[:1] in ("=", "+", "-", "@", "\t", "\r"):
                        try:
                            float(cell)
                        except ValueError:
                            raise AssertionError(f"{path.name}: unguarded cell {cell!r}") from None
    assert seen_brand


def test_a_fully_cached_embed_loads_no_model(tmp_path):
    study = make_tiny_study(tmp_path, per_cell=2)
    root, out = tmp_path / "photos", tmp_path / "embedded"
    command = [sys.executable, "-m", "explore.cli", "--quiet", "embed", str(root), "--out", str(out),
               "--encoder", "bundled"]
    env = dict(os.environ, PYTHONPATH=str(REPO), HF_HUB_OFFLINE="1", PYTHONPROFILEIMPORTTIME="1")
    first = subprocess.run(command, env=env, capture_output=True, text=True, timeout=600, cwd=REPO)
    assert first.returncode == 0, first.stderr[-2000:]
    assert "sentence_transformers" in first.stderr or "timm" in first.stderr  # the model was loaded then
    second = subprocess.run(command, env=env, capture_output=True, text=True, timeout=600, cwd=REPO)
    assert second.returncode == 0, second.stderr[-2000:]
    imported = {line.rsplit("|", 1)[-1].strip() for line in second.stderr.splitlines() if line.startswith("import time:")}
    assert not imported & {"torch", "timm", "sentence_transformers"}, "a fully cached embed imported a model library"
    assert study.is_file()
