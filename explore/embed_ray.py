"""Embed on a Ray cluster: the same batches as a local run, run by Ray actors.

Ray (an optional extra: ``pip install "explore[cluster]"``) does the
scheduling, restarts and retries; this module only hands it batches:

- one actor per worker (default: one per CPU of the cluster), each loading the
  encoder once from an ``EncoderSpec`` and refusing to run when its encoder id
  differs from the driver's (other weights or another explore version on that
  node would put different vectors under the same key);
- an actor runs ``embed.embed_batch`` (decode, preprocess, encode) with one
  torch thread, exactly the local step, so vectors match a local run;
- workers read the images from their paths when they can see them (a folder
  every node mounts at the same path); otherwise, or with ``transfer =
  "bytes"``, the driver reads the files and sends their bytes;
- each finished batch comes back to the driver, which writes it to the cache
  as its own atomic shard (``EmbeddingCache.put``), so killing the driver loses
  at most the batches in flight, and a re-run embeds only what is missing;
- a killed worker process is restarted by Ray and its batches retried
  (``max_restarts`` / ``max_task_retries``); a bad image raises the same
  ``EmbedError`` as locally, after the other batches in flight are stored.
"""

from __future__ import annotations

import os
from pathlib import Path
from contextlib import contextmanager
from dataclasses import dataclass

from explore.embed import EmbedError, ImageFault, embed_batch

INSTALL_HINT = 'Ray is not installed here; install the cluster extra: pip install "explore[cluster]" (or "ray[data]")'

#: Batches queued per worker, so a worker never waits for the driver between two batches.
IN_FLIGHT_PER_WORKER = 2
#: How often Ray restarts a dead worker process and retries its batches.
RETRIES = 3


class ClusterError(EmbedError):
    """The Ray cluster cannot be used as asked; the message says why and what to do."""


def require_ray():
    """Import ray, or raise ``ClusterError`` saying how to install it."""
    try:
        import ray
    except ImportError:
        raise ClusterError(INSTALL_HINT) from None
    return ray


@dataclass(frozen=True)
class EncoderSpec:
    """What a worker needs to build the driver's encoder itself (no model is shipped)."""

    name: str
    model: str | None = None
    pretrained: str | None = None
    weights: str | None = None
    runtime: str = "torch"

    @classmethod
    def of(cls, encoder) -> "EncoderSpec":
        """The spec that rebuilds ``encoder`` (clip: model, tag and weights file)."""
        weights = getattr(encoder, "weights", None)
        return cls(
            name=encoder.family,
            model=getattr(encoder, "model_name", None),
            pretrained=getattr(encoder, "pretrained", None),
            weights=str(weights) if weights else None,
            runtime=getattr(encoder, "runtime", "torch"),
        )

    def load(self):
        from explore.encoders import load_encoder

        encoder, _ = load_encoder(
            self.name, model=self.model, pretrained=self.pretrained, weights=self.weights, runtime=self.runtime
        )
        return encoder


class EmbedWorker:
    """One Ray actor: the encoder loaded once, then ``embed_batch`` per call."""

    def __init__(self, spec: EncoderSpec, encoder_id: str, threads: int = 1):
        import torch

        torch.set_num_threads(max(1, threads))
        self.encoder = spec.load()
        if self.encoder.id != encoder_id:
            import socket

            raise ClusterError(
                f"worker on {socket.gethostname()} built encoder '{self.encoder.id}', the driver "
                f"'{encoder_id}'; install the same explore version and weights on every node"
            )

    def embed(self, items):
        """items: (sha256, path) or (sha256, path, bytes) -> (cluster, joint)."""
        return embed_batch(self.encoder, items)

    def sees(self, path: str) -> bool:
        """Whether this worker can read ``path`` (a folder shared by all nodes)."""
        return os.access(path, os.R_OK)

    def pid(self) -> int:
        return os.getpid()


#: Workers kept between calls while this process stays connected to the same
#: cluster, so a second embedding call (another study, a check after a run)
#: does not load the model again: (connection, spec, encoder id) -> actors.
#: One set at a time: each worker holds a CPU of the cluster while it lives.
_WORKERS: dict = {}


def _workers(ray, spec: EncoderSpec, encoder_id: str, n: int) -> list:
    key = (ray.get_runtime_context().get_job_id(), spec, encoder_id)
    for old in [k for k in _WORKERS if k != key]:
        _drop_workers(ray, _WORKERS[old])
    actors = _WORKERS.setdefault(key, [])
    actor_class = ray.remote(num_cpus=1, max_restarts=RETRIES, max_task_retries=RETRIES)(EmbedWorker)
    while len(actors) < n:
        actors.append(actor_class.remote(spec, encoder_id, 1))
    return actors[:n]


def release_workers() -> None:
    """Stop the workers this process keeps, freeing their CPUs for other drivers."""
    if _WORKERS:
        ray = require_ray()
        for actors in list(_WORKERS.values()):
            _drop_workers(ray, actors)


def _drop_workers(ray, actors) -> None:
    actors = list(actors)
    for key in [k for k, v in _WORKERS.items() if v[: len(actors)] == actors]:
        actors = list(_WORKERS.pop(key))
    for actor in actors:
        try:
            ray.kill(actor)
        except Exception:  # already gone
            pass


@contextmanager
def connect(address: str):
    """Connect to the Ray cluster at ``address`` for the duration of the block.

    ``auto`` joins a cluster already running on this machine; ``HOST:PORT`` a
    head node; ``ray://HOST:PORT`` Ray client; ``local`` starts a private
    single-node instance bound to 127.0.0.1 and stops it afterwards. A
    connection made earlier in the process (``ray.init`` by the caller) is
    used as it is and left open.
    """
    ray = require_ray()
    if ray.is_initialized():
        yield ray
        return
    _WORKERS.clear()
    try:
        if address == "local":
            # Keep every Ray server on the loopback interface for a private instance.
            os.environ.setdefault("RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER", "0")
            ray.init(include_dashboard=False, _node_ip_address="127.0.0.1", log_to_driver=False,
                     configure_logging=False)
        else:
            ray.init(address=address, log_to_driver=False, configure_logging=False)
    except (ConnectionError, RuntimeError, ValueError) as exc:
        raise ClusterError(
            f"cannot connect to a Ray cluster at '{address}': {exc}. Start one with 'ray start --head' "
            "(then use 'auto' on that machine, or HEAD_IP:6379 elsewhere), or use 'local'"
        ) from None
    try:
        yield ray
    finally:
        _WORKERS.clear()
        ray.shutdown()


def embed_on_ray(cache, todo, encoder, batch_size: int, progress: bool, address: str,
                 workers: int = 0, transfer: str = "auto", spec: EncoderSpec | None = None,
                 skipped: dict | None = None) -> None:
    """Embed ``todo`` ((sha256, path) pairs) on the cluster, writing each batch to ``cache``.

    Parameters
    ----------
    cache : the open ``EmbeddingCache`` (the driver holds its lock and writes).
    todo : distinct (sha256, path) pairs missing from the cache.
    encoder : the driver's encoder (its id keys the cache; workers rebuild it).
    batch_size : images per batch and per shard (a small job is split evenly
        over the workers).
    progress : show images done, rate and time left across the cluster.
    address, workers, transfer : see ``study.ClusterSettings``.
    spec : how workers build the encoder (default ``EncoderSpec.of(encoder)``).
    skipped : when given, an image that changed or vanished since collect is
        recorded here (sha256 -> (status, reason)) and the rest of its batch is
        embedded again, as a local run does; otherwise its error is raised.

    Raises
    ------
    EmbedError for a bad image (as locally) once the other batches in flight
    are stored; ClusterError when Ray is missing or the cluster cannot be used.
    """
    from tqdm.auto import tqdm

    if transfer not in ("auto", "path", "bytes"):
        raise ValueError(f"transfer must be auto, path or bytes, got {transfer!r}")
    spec = spec or EncoderSpec.of(encoder)
    with connect(address) as ray:
        from ray.exceptions import RayActorError, RayTaskError

        cpus = max(1, int(ray.cluster_resources().get("CPU", 1)))
        n_workers = workers or cpus
        batch_size = max(1, min(batch_size, -(-len(todo) // n_workers)))
        batches = [todo[i : i + batch_size] for i in range(0, len(todo), batch_size)]
        n_workers = min(n_workers, len(batches))
        actors = _workers(ray, spec, encoder.id, n_workers)
        healthy = False
        try:
            try:
                if transfer == "auto":
                    seen = ray.get([a.sees.remote(todo[0][1]) for a in actors])
                    transfer = "path" if all(seen) else "bytes"
            except RayActorError as exc:  # the constructor failed: say why
                raise _actor_failure(exc) from None
            queue = iter(batches)
            retry: list = []  # batches whose changed image was left out, to embed again
            pending: dict = {}
            error: BaseException | None = None

            def submit(actor) -> None:
                batch = retry.pop() if retry else next(queue, None)
                if batch is None:
                    return
                try:
                    items = batch if transfer == "path" else [(s, p, _read(p)) for s, p in batch]
                except EmbedError as exc:
                    nonlocal error
                    error = error or exc
                    return
                pending[actor.embed.remote(items)] = (batch, actor)

            desc = f"embed (ray, {n_workers} worker{'s' if n_workers != 1 else ''})"
            with tqdm(total=len(todo), desc=desc, unit="img", disable=not progress) as bar:
                for _ in range(IN_FLIGHT_PER_WORKER):
                    for actor in actors:
                        submit(actor)
                while pending:
                    done, _ = ray.wait(list(pending), num_returns=1)
                    batch, actor = pending.pop(done[0])
                    try:
                        cluster, joint = ray.get(done[0])
                    except RayTaskError as exc:  # the batch's own error (e.g. an image changed)
                        cause = _cause(exc)
                        if skipped is not None and isinstance(cause, ImageFault):
                            skipped[cause.sha256] = (cause.status, cause.reason)
                            bar.update(1)
                            rest = [item for item in batch if item[0] != cause.sha256]
                            if rest:
                                retry.append(rest)
                            if error is None:
                                submit(actor)
                            continue
                        error = error or cause
                        continue
                    except RayActorError as exc:  # the worker died more often than Ray retries
                        error = error or _actor_failure(exc)
                        continue
                    cache.put([sha for sha, _ in batch], cluster, joint)
                    bar.update(len(batch))
                    if error is None:
                        submit(actor)
                    elif not pending:
                        break
            healthy = not isinstance(error, ClusterError)
            if error is not None:
                raise error
        finally:
            if not healthy:  # a constructor or worker failure, or an interruption: start afresh next time
                _drop_workers(ray, actors)


def _read(path: str) -> bytes:
    """The file's bytes for a worker that cannot see it; problems read as in ``embed_batch``."""
    from explore.collect import ImageProblem, _read_bytes

    try:
        return _read_bytes(Path(path))
    except ImageProblem as problem:
        raise EmbedError(f"{path}: {problem.reason} (during this run; run again to re-collect)") from None


def _cause(exc) -> BaseException:
    cause = getattr(exc, "cause", None)
    if isinstance(cause, EmbedError):
        return cause
    return EmbedError(f"a Ray worker failed: {cause or exc}")


def _actor_failure(exc) -> BaseException:
    cause = getattr(exc, "cause", None) or getattr(exc, "error_msg", None) or exc
    if isinstance(cause, BaseException) and isinstance(getattr(cause, "cause", None), EmbedError):
        return cause.cause
    return ClusterError(f"a Ray worker could not run: {cause}")
