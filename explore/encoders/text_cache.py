"""Text vectors kept on disk per encoder, so a re-run embeds no prompt twice.

Attribute prompts, context phrases and the commercial-post prompts are
embedded by the encoder's text model on every run. Loading that model (and
importing torch with it) costs several seconds, more than a re-run with every
image vector cached should take. So each encoder keeps the vectors of the
texts it has embedded in one small file per encoder id, and loads its text
model only for texts it has never seen.

Each text is embedded on its own (a batch of one), so its vector never depends
on which other texts were embedded with it: a run with a cold cache and a run
with a warm one give the same vectors, bit for bit.

The file is rewritten atomically (temporary file, then rename) with the
entries of any other process merged in; a damaged or unreadable file is
ignored and rebuilt, which only costs the embedding again.
"""

from __future__ import annotations

import hashlib
import os
import threading
from pathlib import Path
from typing import Callable

import numpy as np

from explore.encoders.base import model_cache_dir

#: Bump when the file layout changes.
TEXT_CACHE_VERSION = 1

_LOCK = threading.Lock()
# encoder id -> {text: vector}; one copy per process.
_MEMORY: dict[str, dict[str, np.ndarray]] = {}


def cache_path(encoder_id: str) -> Path:
    """The file holding ``encoder_id``'s text vectors (in ``model_cache_dir()/texts``)."""
    digest = hashlib.sha256(encoder_id.encode()).hexdigest()[:12]
    safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in encoder_id)[:80]
    return model_cache_dir() / "texts" / f"{safe}-{digest}-v{TEXT_CACHE_VERSION}.npz"


def _read(path: Path, encoder_id: str) -> dict[str, np.ndarray]:
    try:
        with np.load(path, allow_pickle=False) as data:
            if str(data["encoder_id"]) != encoder_id:
                return {}
            texts = [str(t) for t in data["texts"]]
            vectors = np.asarray(data["vectors"], dtype=np.float32)
    except (OSError, ValueError, KeyError):
        return {}
    if vectors.ndim != 2 or len(vectors) != len(texts) or not np.isfinite(vectors).all():
        return {}
    return {text: vectors[i] for i, text in enumerate(texts)}


def _write(path: Path, encoder_id: str, entries: dict[str, np.ndarray]) -> None:
    """Atomic write; a failure (read-only or full disk) only costs recomputation next time."""
    texts = list(entries)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(tmp, "wb") as fh:
            np.savez(
                fh,
                encoder_id=np.asarray(encoder_id),
                texts=np.asarray(texts, dtype=str),
                vectors=np.stack([entries[t] for t in texts]).astype(np.float32),
            )
        os.replace(tmp, path)
    except OSError:
        tmp.unlink(missing_ok=True)


def encode_texts_cached(
    encoder_id: str, texts: list[str], encode: Callable[[list[str]], np.ndarray], dim: int
) -> np.ndarray:
    """``encode(texts)`` through the disk cache of ``encoder_id``.

    Parameters
    ----------
    encoder_id : the encoder's id (its weights digest included), the cache key.
    texts : the texts to embed, in order (repeats allowed).
    encode : the encoder's own text embedding, called once per text not yet
        cached, with a list of that one text; it loads the text model on demand.
    dim : the vector dimension (for an empty ``texts``).

    Returns
    -------
    (len(texts), dim) float32 array, rows in the order of ``texts``.
    """
    texts = [str(t) for t in texts]
    if not texts:
        return np.zeros((0, dim), dtype=np.float32)
    with _LOCK:
        known = _MEMORY.get(encoder_id)
        if known is None:
            known = _MEMORY[encoder_id] = _read(cache_path(encoder_id), encoder_id)
        missing = [t for t in dict.fromkeys(texts) if t not in known]
    if missing:
        new = {t: np.asarray(encode([t]), dtype=np.float32).reshape(-1) for t in missing}
        with _LOCK:
            path = cache_path(encoder_id)
            merged = _read(path, encoder_id)  # entries other processes added meanwhile
            merged.update(known)
            merged.update(new)
            _write(path, encoder_id, merged)
            known.update(new)
    return np.ascontiguousarray(np.stack([known[t] for t in texts]), dtype=np.float32)
