"""Embed: every usable image of the images table becomes vectors of one encoder.

The work per batch is a pure function (decode, preprocess, encode), so it could
be mapped over shards elsewhere; here it runs on the local CPU:

- only images whose content hash is not yet in the cache are embedded, each
  distinct content once;
- batches run in parallel streams, one per CPU (``embed_batch`` in a thread
  each; PIL and torch release the GIL). A stream decodes its batch, then runs
  the model on it with ``cpus // streams`` torch threads, so while one
  stream decodes the others keep the cores busy, and no core is shared by two
  busy threads;
- large JPEGs are decoded at reduced size (libjpeg DCT scaling), just large
  enough for the model's own resize step (input side / 0.875), which saves
  most of the decoding cost;
- the model runs batched under ``torch.inference_mode()``;
- each finished batch is written to the cache at once, so an interruption
  loses at most the batches in flight (one per stream).
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import numpy as np

from explore.cache import EmbeddingCache

#: Upper bound on the default number of parallel streams (each holds a batch of
#: decoded images and the model's activations for it).
MAX_STREAMS = 8


class EmbedError(RuntimeError):
    """Embedding cannot go on (a file changed since it was collected, or the encoder misbehaves)."""


class ImageFault(EmbedError):
    """One image cannot be embedded now (it changed or vanished since collect); the run skips it."""

    def __init__(self, sha256: str, path: str, status: str, reason: str):
        super().__init__(f"{path}: {reason} (during this run; run again to re-collect)")
        self.sha256, self.path, self.status, self.reason = sha256, path, status, reason

    def __reduce__(self):  # picklable with its fields (a Ray worker sends it to the driver)
        return (type(self), (self.sha256, self.path, self.status, self.reason))


@dataclass
class Embeddings:
    """Vectors aligned with the usable rows (``status == "ok"``) of the images table.

    ``cluster`` (n x d_c) and ``joint`` (n x d_j) are float32 and L2-normalised;
    row i of both belongs to ``image_ids[i]``.
    """

    image_ids: list[str]
    encoder_id: str
    cluster: np.ndarray
    joint: np.ndarray

    def __len__(self) -> int:
        return len(self.image_ids)


@dataclass
class EmbedStats:
    """What one ``embed_table`` call did."""

    embedded: int = 0  # distinct images run through the encoder now
    reused: int = 0  # distinct images whose vectors came from the cache
    duplicates: int = 0  # usable rows sharing content with another row (embedded once)
    seconds: float = 0.0  # time spent embedding new images
    notes: list[str] = field(default_factory=list)
    #: sha256 -> (status, reason) of images that could not be embedded now (changed
    #: or gone since collect); their rows are left out of the Embeddings.
    skipped: dict = field(default_factory=dict)

    @property
    def rate(self) -> float:
        return self.embedded / self.seconds if self.seconds > 0 else 0.0

    def describe(self) -> str:
        """One line, e.g. ``embedded 120 new images, reused 380 from cache``."""
        text = f"embedded {self.embedded} new image{'s' if self.embedded != 1 else ''}, reused {self.reused} from cache"
        if self.embedded and self.seconds > 0:
            text += f" ({self.rate:.1f} images/s)"
        if self.duplicates:
            text += f"; {self.duplicates} duplicate row{'s' if self.duplicates != 1 else ''} share vectors"
        return text


def embed_table(
    table,
    encoder,
    cache_dir,
    batch_size: int = 32,
    progress: bool = True,
    streams: int | None = None,
    cluster=None,
) -> tuple[Embeddings, EmbedStats]:
    """Vectors for every usable image of ``table``, embedding only what the cache lacks.

    Parameters
    ----------
    table : the images table (``collect.collect_images``); rows with status
        ``ok`` are embedded.
    encoder : an ``explore.encoders.base.Encoder``.
    cache_dir : the cache folder (``EmbeddingCache``); held locked during the call.
    batch_size : images per model call and per cache shard (at most; a job
        of fewer than ``streams * batch_size`` images is split evenly over the
        streams).
    progress : show a progress bar (count, rate, time left).
    streams : batches embedded at once, each decoding then encoding in its own
        thread with ``cpus // streams`` torch threads (default: one per CPU,
        at most ``MAX_STREAMS``).
    cluster : a ``study.ClusterSettings``; with an ``address`` the new images
        are embedded on that Ray cluster (``embed_ray``), into the same cache
        and with the same keys; without one (default) here.

    Returns
    -------
    (Embeddings, EmbedStats)

    Raises
    ------
    CacheBusy when another run holds the cache; EmbedError when an image can no
    longer be decoded or the encoder returns malformed vectors.
    """
    if batch_size < 1:
        raise ValueError(f"batch_size must be at least 1, got {batch_size}")
    if streams is not None and streams < 1:
        raise ValueError(f"streams must be at least 1, got {streams}")
    usable = table[table["status"] == "ok"]
    image_ids = usable["image_id"].astype(str).tolist()
    shas = usable["sha256"].astype(str).tolist()
    paths = usable["path"].astype(str).tolist()
    if any(not s for s in shas):
        raise EmbedError("the images table has usable rows without a sha256; run collect again")
    if len(set(image_ids)) != len(image_ids):
        raise EmbedError("the images table has repeated image_id values among usable rows")
    stats = EmbedStats(duplicates=len(shas) - len(set(shas)))

    with EmbeddingCache(cache_dir, encoder.id) as cache:
        stats.notes += cache.notes
        todo = cache.missing(shas)
        stats.reused = len(set(shas)) - len(todo)
        if todo:
            path_of = {}
            for sha, path in zip(shas, paths):
                path_of.setdefault(sha, path)
            start = time.perf_counter()
            try:
                items = [(s, path_of[s]) for s in todo]
                if cluster is not None and cluster.address:
                    from explore.embed_ray import embed_on_ray

                    embed_on_ray(cache, items, encoder, batch_size, progress, cluster.address,
                                 workers=cluster.workers, transfer=cluster.transfer, skipped=stats.skipped)
                else:
                    _embed_into(cache, items, encoder, batch_size, progress, streams, stats.skipped)
            except BaseException:
                try:
                    cache.compact()  # merge what was written; never hide the first error (e.g. a full disk)
                except OSError:
                    pass
                raise
            else:
                cache.compact()
            finally:
                stats.embedded = len(todo) - len(cache.missing(todo))
                stats.seconds = time.perf_counter() - start
        if stats.skipped:  # an image changed during the run: leave its rows out, the run goes on
            keep = [i for i, sha in enumerate(shas) if sha not in stats.skipped]
            image_ids = [image_ids[i] for i in keep]
            shas = [shas[i] for i in keep]
        cluster, joint = cache.get(shas)
    return Embeddings(image_ids=image_ids, encoder_id=encoder.id, cluster=cluster, joint=joint), stats


def available_cpus() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def default_streams(cpus: int | None = None) -> int:
    """Batches embedded at once: one per CPU, at most ``MAX_STREAMS``."""
    return max(1, min(MAX_STREAMS, cpus or available_cpus()))


def embed_batch(encoder, items, draft_size: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Decode, preprocess and encode one batch: the pure step of embedding.

    Parameters
    ----------
    encoder : an ``explore.encoders.base.Encoder``.
    items : (sha256, path) pairs, or (sha256, path, bytes) when the file was
        read elsewhere; each file must still hash to its sha256.
    draft_size : JPEGs are decoded at reduced scale, both sides at least this
        (default: just above ``encoder.input_size / 0.875``).

    Returns
    -------
    (cluster, joint) float32 arrays, one checked, L2-normalised row per item.
    """
    import torch

    from explore.collect import ImageProblem, open_rgb

    if not items:
        raise ValueError("embed_batch needs at least one image")
    if draft_size is None:
        # Just large enough for the model's own resize step (timm and open_clip
        # resize the short side to at most input_size / 0.875 before cropping),
        # so a phone photo is decoded at 1/4 or 1/8 scale, not in full.
        draft_size = int(encoder.input_size / 0.875) + 1
    tensors = []
    for item in items:  # (sha256, path), or (sha256, path, bytes) read elsewhere
        sha, path = item[0], item[1]
        data = item[2] if len(item) > 2 else None
        try:
            image = open_rgb(path, draft_size=draft_size, expect_sha256=sha, data=data)
            tensors.append(encoder.preprocess(image))
        except ImageProblem as problem:
            raise ImageFault(sha, str(path), problem.status, problem.reason) from None
    with torch.inference_mode():
        out = encoder.encode_images(torch.stack(tensors))
    return _check(out, "cluster", len(items), encoder.id), _check(out, "joint", len(items), encoder.id)


def _embed_into(cache: EmbeddingCache, todo, encoder, batch_size, progress, streams, skipped=None) -> None:
    """Run ``embed_batch`` in parallel streams; write each finished batch to the cache.

    A stream decodes its batch, then encodes it with ``cpus // streams`` torch
    threads. While one stream decodes, the others keep the model busy, and no
    core is shared by two busy threads. On an error the batches already in
    flight are still written, then the first error is raised.
    """
    from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait

    import torch
    from tqdm.auto import tqdm

    cpus = available_cpus()
    streams = streams or default_streams(cpus)
    # A small job is spread over the streams (smaller batches) rather than
    # leaving cores idle; with fewer batches than streams, each stream that
    # runs gets more torch threads.
    batch_size = max(1, min(batch_size, -(-len(todo) // streams)))
    batches = [todo[i : i + batch_size] for i in range(0, len(todo), batch_size)]
    streams = min(streams, len(batches))
    threads = max(1, cpus // streams)
    batches = iter(batches)
    threads_before = torch.get_num_threads()  # the streams' setting is process-wide: restored below
    pool = ThreadPoolExecutor(
        max_workers=streams, thread_name_prefix="explore-embed", initializer=torch.set_num_threads, initargs=(threads,)
    )
    pending: dict = {}
    error: BaseException | None = None

    def submit_next() -> None:
        batch = next(batches, None)
        if batch is not None:
            pending[pool.submit(embed_batch, encoder, batch)] = batch

    try:
        with tqdm(total=len(todo), desc="embed", unit="img", disable=not progress) as bar:
            for _ in range(streams):
                submit_next()
            while pending:
                done, _ = wait(pending, return_when=FIRST_COMPLETED)
                for future in done:
                    batch = pending.pop(future)
                    try:
                        cluster, joint = future.result()
                    except ImageFault as fault:  # one image changed: skip it, embed the rest of its batch
                        if skipped is None:
                            error = error or fault
                            continue
                        skipped[fault.sha256] = (fault.status, fault.reason)
                        bar.update(1)
                        rest = [item for item in batch if item[0] != fault.sha256]
                        if rest:
                            pending[pool.submit(embed_batch, encoder, rest)] = rest
                        elif error is None:
                            submit_next()
                        continue
                    except Exception as exc:  # keep what the other streams finish, then raise
                        error = error or exc
                        continue
                    cache.put([sha for sha, _ in batch], cluster, joint)
                    bar.update(len(batch))
                    if error is None:
                        submit_next()
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
        torch.set_num_threads(threads_before)
    if error is not None:
        raise error


def _check(out: dict, key: str, n: int, encoder_id: str) -> np.ndarray:
    if key not in out:
        raise EmbedError(f"encoder {encoder_id} returned no '{key}' vectors")
    vectors = np.asarray(out[key], dtype=np.float32)
    if vectors.ndim != 2 or len(vectors) != n:
        raise EmbedError(f"encoder {encoder_id} returned '{key}' of shape {vectors.shape} for {n} images")
    if not np.isfinite(vectors).all():
        raise EmbedError(f"encoder {encoder_id} returned non-finite '{key}' vectors")
    norms = np.linalg.norm(vectors, axis=1)
    if np.abs(norms - 1.0).max() > 1e-3:
        raise EmbedError(f"encoder {encoder_id} returned '{key}' vectors that are not L2-normalised")
    return vectors
