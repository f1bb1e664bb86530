"""A short catalogue of open_clip models worth running on a CPU.

Published figures are carried, not measured here: zero-shot ImageNet-1k top-1
and the mean over open_clip's 38 evaluation tasks, from open_clip's results
table (``docs/openclip_results.csv`` in the mlfoundations/open_clip
repository, read at commit f862f86c). A model the table does not list keeps
NaN there and is never chosen as the default by those figures.

Speed is measured on this project's machine, end to end (JPEG decoding,
preprocessing and the model, through ``explore.embed.embed_table``) with random
weights, by ``benchmarks/clip_catalogue.py``; the figures below are that run's
(see README "Choosing a CLIP model"). Weights size is the float32 state dict
of the model as open_clip builds it, measured by the same benchmark.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

RESULTS_SOURCE = "open_clip docs/openclip_results.csv (mlfoundations/open_clip, commit f862f86c)"
SPEED_SOURCE = "benchmarks/clip_catalogue.py on this project's machine"
#: A candidate default must run at least this fraction of ViT-B-32's images per second.
SPEED_FLOOR = 0.8
NAN = float("nan")


@dataclass(frozen=True)
class CatalogueModel:
    """One open_clip model and pretrained tag with its published and measured figures."""

    model: str
    pretrained: str
    #: Zero-shot ImageNet-1k top-1 (fraction), from RESULTS_SOURCE; NaN when not listed.
    imagenet_top1: float
    #: Mean over the 38 tasks of open_clip's benchmark (fraction), from RESULTS_SOURCE.
    mean_38: float
    #: Images per second here, end to end, random weights (SPEED_SOURCE).
    images_per_second: float
    #: Size of the float32 weights in MB (10^6 bytes).
    weights_mb: float
    #: Apply MobileOne-style reparameterisation before inference (MobileCLIP).
    reparameterize: bool = False
    note: str = ""

    @property
    def key(self) -> str:
        return f"{self.model}/{self.pretrained}"


# Speed and size from benchmarks/clip_catalogue.py, 2026-12-02, 2 cores with
# AVX-512, load average 0.7-1.4 during the run, 48 JPEGs, batch 16, best of 2
# rounds; update both together (and the README table).
CATALOGUE: tuple[CatalogueModel, ...] = (
    CatalogueModel("ViT-B-32", "laion2b_s34b_b79k", 0.6656, 0.5694, 20.2, 605, note="the previous default"),
    CatalogueModel("ViT-B-32", "datacomp_xl_s13b_b90k", 0.6917, 0.5795, 20.4, 605),
    CatalogueModel("ViT-B-32-256", "datacomp_s34b_b86k", 0.7281, 0.6087, 16.9, 605, note="256 px input"),
    CatalogueModel(
        "MobileCLIP2-S0",
        "dfndr2b",
        NAN,
        NAN,
        15.8,
        300,
        reparameterize=True,
        note="not in open_clip's results table; reparameterised for inference",
    ),
    CatalogueModel("ViT-B-16", "datacomp_xl_s13b_b90k", 0.7349, 0.6147, 5.4, 598, note="slower, more accurate"),
)


def find(model: str, pretrained: str | None) -> CatalogueModel | None:
    """The catalogue entry for (model, pretrained), or None."""
    for entry in CATALOGUE:
        if entry.model == model and (pretrained is None or entry.pretrained == pretrained):
            return entry
    return None


def choose_default(entries=CATALOGUE, reference: str = "ViT-B-32/laion2b_s34b_b79k", floor: float = SPEED_FLOOR):
    """The entry with the best published 38-task mean among those at least ``floor`` x as fast as ``reference``.

    Entries without a published mean or a measured speed are not candidates.
    Returns (entry, reason) where reason states the figures.
    """
    by_key = {e.key: e for e in entries}
    base = by_key[reference]
    if not math.isfinite(base.images_per_second):
        return base, f"no speed measured; kept {reference}"
    candidates = [
        e
        for e in entries
        if math.isfinite(e.mean_38) and math.isfinite(e.images_per_second)
        and e.images_per_second >= floor * base.images_per_second
    ]
    best = max(candidates, key=lambda e: e.mean_38)
    reason = (
        f"{best.key}: 38-task mean {best.mean_38:.3f} (best of the models running at least "
        f"{floor:.0%} as fast as {reference}; {best.images_per_second:.1f} vs "
        f"{base.images_per_second:.1f} img/s here)"
    )
    return best, reason
