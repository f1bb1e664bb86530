"""`explore encoders`: the families, and the catalogue of clip models a CPU can run.

Outside reference for the published figures: open_clip's results table
(docs/openclip_results.csv in the mlfoundations/open_clip repository, commit
f862f86c), carried in explore/encoders/catalogue.py; the rows checked here are
copied from that table (ImageNet-1k zero-shot top-1 and the 38-task mean).
Whether weights are local is decided from the Hugging Face cache layout
(huggingface_hub docs, "Understand caching"), built here by hand.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

# From open_clip's docs/openclip_results.csv (commit f862f86c): name, pretrained, imagenet1k, average
PUBLISHED = {
    ("ViT-B-32", "laion2b_s34b_b79k"): ("66.6", "0.569"),
    ("ViT-B-32", "datacomp_xl_s13b_b90k"): ("69.2", "0.580"),
    ("ViT-B-32-256", "datacomp_s34b_b86k"): ("72.8", "0.609"),
    ("ViT-B-16", "datacomp_xl_s13b_b90k"): ("73.5", "0.615"),
}


def _encoders(home: Path) -> str:
    env = dict(os.environ, PYTHONPATH=str(REPO), HOME=str(home), XDG_CACHE_HOME=str(home / ".cache"),
               HF_HOME=str(home / ".cache" / "huggingface"), HF_HUB_OFFLINE="1")
    for var in ("EXPLORE_CLIP_WEIGHTS", "HF_HUB_CACHE", "HUGGINGFACE_HUB_CACHE"):
        env.pop(var, None)
    done = subprocess.run([sys.executable, "-m", "explore.cli", "encoders"], env=env, capture_output=True,
                          text=True, timeout=120, cwd=REPO)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_catalogue_rows_carry_published_figures_and_where_the_weights_are(tmp_path):
    home = tmp_path / "home"
    # ViT-B-32 / datacomp_xl_s13b_b90k cached as huggingface_hub lays it out: "local" for that row only
    repo = home / ".cache" / "huggingface" / "hub" / "models--laion--CLIP-ViT-B-32-DataComp.XL-s13B-b90K"
    snapshot = repo / "snapshots" / "0123456789abcdef"
    snapshot.mkdir(parents=True)
    (repo / "refs").mkdir()
    (repo / "refs" / "main").write_text("0123456789abcdef")
    (snapshot / "open_clip_pytorch_model.bin").write_bytes(b"weights")
    out = _encoders(home)
    lines = out.splitlines()
    for (model, tag), (top1, mean) in PUBLISHED.items():
        row = next(line for line in lines if line.split()[:2] == [model, tag])
        assert row.split()[2:4] == [top1, mean], row
    local = next(line for line in lines if line.split()[:2] == ["ViT-B-32", "datacomp_xl_s13b_b90k"])
    assert "local (" in local and str(snapshot) in local
    default = next(line for line in lines if line.split()[:2] == ["ViT-B-32-256", "datacomp_s34b_b86k"])
    assert "not local (explore fetch-model ViT-B-32-256/datacomp_s34b_b86k)" in default and default.endswith("*")
    mobile = next(line for line in lines if line.startswith("MobileCLIP2-S0"))
    assert mobile.split()[2:4] == ["-", "-"]  # not in the published table: no figure invented
    assert "* default: ViT-B-32-256/datacomp_s34b_b86k" in out and "f862f86c" in out
    assert out.splitlines()[0].startswith("clip") and "not available" in out.splitlines()[0]
    assert any(line.startswith("auto") and "-> bundled" in line for line in lines)
