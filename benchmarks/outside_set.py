"""The outside labelled set the bundled encoder is tuned and checked on (never the demo).

Debian's ``openclipart-png`` package (/usr/share/openclipart/png), ten topic
folders, the first 40 images of each in file-name order (files directly in the
folder first, then its subfolders; a topic with fewer has all of them), each
composited on white (the clip art is transparent PNG). Labels are the folder
names; prompts are the folder names too, through the study's default
templates, so nothing is worded by hand for the test.

Measures: ROC AUC of the prompt-pair margin for three topic pairs
(scikit-learn ``roc_auc_score``), and 10-way zero-shot accuracy (chance 0.10)
by the rule explore names contexts with (explore/contexts/naming.py): each topic's
similarity standardised over all images, then the highest; the plain argmax
of the raw similarities is printed beside it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path("/usr/share/openclipart/png")
TOPICS = {
    "beverages": "food/beverages",
    "sports": "recreation/sports",
    "party": "recreation/party",
    "boating": "transportation/boating",
    "mammals": "animals/mammals",
    "flowers": "plants/flowers",
    "music": "recreation/music",
    "fruit": "food/fruit",
    "transportation": "transportation",
    "weather": "signs_and_symbols/weather",
}
PAIRS = (("beverages", "sports"), ("party", "boating"), ("mammals", "transportation"))
PER_TOPIC = 40
NAME = "Debian openclipart-png topic folders (first 40 images each, on white)"


def available(root: Path = ROOT) -> bool:
    return all((root / folder).is_dir() for folder in TOPICS.values())


def topic_files(topic: str, root: Path = ROOT, n: int = PER_TOPIC) -> list[Path]:
    folder = root / TOPICS[topic]
    other_topics = {root / f for t, f in TOPICS.items() if t != topic}
    direct = sorted(folder.glob("*.png"))
    nested = sorted(
        p for p in folder.rglob("*.png") if p.parent != folder and not any(o in p.parents for o in other_topics)
    )
    return (direct + nested)[:n]


def on_white(path: Path):
    from PIL import Image

    with Image.open(path) as im:
        rgba = im.convert("RGBA")
    white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    return Image.alpha_composite(white, rgba).convert("RGB")


@dataclass
class OutsideSet:
    topics: list[str]
    labels: np.ndarray  # (n,) topic index
    paths: list[Path]


def load_set(root: Path = ROOT) -> OutsideSet:
    topics = list(TOPICS)
    paths, labels = [], []
    for i, topic in enumerate(topics):
        files = topic_files(topic, root)
        paths += files
        labels += [i] * len(files)
    return OutsideSet(topics, np.asarray(labels), paths)


def bundled_outputs(encoder, data: OutsideSet, batch_size: int = 32) -> tuple[np.ndarray, np.ndarray]:
    """(pooled CNN features, ImageNet class probabilities) for every image, computed once."""
    import torch

    pooled, probs = [], []
    for start in range(0, len(data.paths), batch_size):
        batch = torch.stack([encoder.preprocess(on_white(p)) for p in data.paths[start : start + batch_size]])
        a, b = encoder._forward(batch)
        pooled.append(a)
        probs.append(b)
    return np.concatenate(pooled), np.concatenate(probs)


def topic_vectors(encode_texts, topics, templates) -> np.ndarray:
    """One side vector per topic: its name in every template, ensembled as the attributes stage does."""
    from explore.attributes.prompts import ensemble

    return np.stack([ensemble(encode_texts([t.format(topic) for t in templates])) for topic in topics])


def evaluate(joint: np.ndarray, data: OutsideSet, sides: np.ndarray) -> dict:
    """10-way accuracy and per-pair AUC of the margin cos(image, a) - cos(image, b)."""
    from sklearn.metrics import roc_auc_score

    sims = joint @ sides.T
    standard = (sims - sims.mean(axis=0)) / np.clip(sims.std(axis=0), 1e-12, None)
    out = {
        "accuracy_10way": float((standard.argmax(axis=1) == data.labels).mean()),
        "accuracy_10way_raw": float((sims.argmax(axis=1) == data.labels).mean()),
    }
    aucs = []
    for a, b in PAIRS:
        ia, ib = data.topics.index(a), data.topics.index(b)
        keep = np.isin(data.labels, [ia, ib])
        margin = sims[keep, ia] - sims[keep, ib]
        auc = float(roc_auc_score(data.labels[keep] == ia, margin))
        out[f"auc_{a}_vs_{b}"] = auc
        aucs.append(auc)
    out["mean_pair_auc"] = float(np.mean(aucs))
    return out
