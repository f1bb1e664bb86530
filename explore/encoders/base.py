"""The small protocol every encoder family implements.

An encoder turns images into two kinds of L2-normalised float32 vectors:

- ``cluster`` vectors, used to find usage contexts (UMAP + HDBSCAN) and to
  compare brands by what their photos look like;
- ``joint`` vectors, living in the same space as ``encode_texts``, used to
  score attributes and name contexts zero-shot.

For CLIP both are the same image embedding. For the bundled encoder the
cluster vector is the CNN's pooled feature and the joint vector is the ConSE
vector in the sentence encoder's space.

Embedding is a pure function of a batch: ``preprocess`` one decoded image into
a tensor, stack, then ``encode_images``. That keeps decoding (I/O) outside and
lets the batch step run anywhere.

Building an encoder is cheap: it settles its ``id`` (from the weights' digests)
and the few numbers scoring needs, and loads a model only when it is first
used. A re-run whose image vectors are all cached, and whose prompts were
embedded before (``text_cache``), loads no model at all.
"""

from __future__ import annotations

import hashlib
import os
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Protocol, runtime_checkable

import numpy as np

if TYPE_CHECKING:  # torch is imported lazily at run time
    import torch
    from PIL import Image


@lru_cache(maxsize=8)
def _file_digest(path: str, size: int, mtime_ns: int) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def file_digest(path: Path) -> str:
    """sha256 of a weights file, computed once per process per (path, size, mtime).

    Encoder ids include it, so changed weights never share cached vectors.
    """
    st = os.stat(path)
    return _file_digest(str(path), st.st_size, st.st_mtime_ns)


def model_cache_dir() -> Path:
    """Where encoders keep what they derive from their models between runs (label and text
    vectors, model facts, exported towers): ``EXPLORE_MODEL_CACHE``, else
    ``$XDG_CACHE_HOME/explore``, else ``~/.cache/explore``."""
    if os.environ.get("EXPLORE_MODEL_CACHE"):
        return Path(os.environ["EXPLORE_MODEL_CACHE"]).expanduser()
    xdg = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(xdg) / "explore"


class EncoderUnavailable(RuntimeError):
    """The encoder cannot run here (e.g. weights missing); the message says how to fix it."""


@runtime_checkable
class Encoder(Protocol):
    #: Changes whenever the model or its weights change; keys the cache.
    id: str
    #: "clip" or "bundled".
    family: str
    #: Side of the square model input, in pixels (lets decoding draft-scale JPEGs).
    input_size: int
    #: Scale and bias applied to cosine-similarity differences when scoring
    #: a prompt pair: p = sigmoid(logit_scale * (s_pos - s_neg) + logit_bias).
    logit_scale: float
    logit_bias: float

    # preprocess and encode_images are called from several threads at once
    # (embed runs one batch per stream), so they must not change shared state
    # without a lock.

    def preprocess(self, image: "Image.Image") -> "torch.Tensor":
        """One RGB PIL image -> a CHW float tensor ready for batching."""

    def encode_images(self, batch: "torch.Tensor") -> dict[str, np.ndarray]:
        """NCHW batch -> {"cluster": (n, d_c), "joint": (n, d_j)}, L2-normalised float32."""

    def encode_texts(self, texts: list[str]) -> np.ndarray:
        """Texts -> (m, d_j) L2-normalised float32 vectors in the joint space."""
