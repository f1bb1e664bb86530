"""Fast paths for an encoder's image tower: int8 dynamic quantisation and ONNX Runtime.

A fast path is offered only where ``benchmarks/fast_path.py`` measured it
faster than the exact float32 PyTorch path on this project's machine and its
vectors within cosine ``MIN_COSINE`` of the exact ones on the same outside
images (see README "Fast paths"). These helpers build the candidates the
benchmark measures; a fast path's vectors must get their own encoder id, so
they never mix with exact ones in the cache.

torch, onnx and onnxruntime are imported inside the functions.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import torch

#: The agreement a fast path must keep with the exact path (cosine of every image's vectors).
MIN_COSINE = 0.999


def clip_vectors(embedding: np.ndarray) -> dict[str, np.ndarray]:
    """A clip tower's raw image embedding -> {"cluster", "joint"} as ``ClipEncoder.encode_images`` builds them."""
    e = np.asarray(embedding, dtype=np.float32)
    e = e / np.clip(np.linalg.norm(e, axis=1, keepdims=True), 1e-12, None)
    e = np.ascontiguousarray(e, dtype=np.float32)
    return {"cluster": e, "joint": e}


def bundled_vectors(encoder, pooled: np.ndarray, logits: np.ndarray) -> dict[str, np.ndarray]:
    """The bundled tower's (pooled features, logits) -> {"cluster", "joint"} as ``BundledEncoder.encode_images``."""
    from explore.encoders.bundled import conse, soften

    pooled = np.asarray(pooled, dtype=np.float32)
    logits = np.asarray(logits, dtype=np.float64)
    logits = logits - logits.max(axis=1, keepdims=True)
    probabilities = np.exp(logits)
    probabilities /= probabilities.sum(axis=1, keepdims=True)
    cluster = pooled / np.clip(np.linalg.norm(pooled, axis=1, keepdims=True), 1e-12, None)
    joint = conse(soften(probabilities, encoder.temperature), encoder.label_embeddings(), encoder.top_t)
    return {"cluster": cluster.astype(np.float32), "joint": joint}


def _tower_class():
    import torch

    class BundledTower(torch.nn.Module):
        """The bundled image model as one module: pixels -> (pooled features, ImageNet logits)."""

        def __init__(self, model):
            super().__init__()
            self.model = model

        def forward(self, x):
            x = x.contiguous(memory_format=torch.channels_last)  # as BundledEncoder._forward
            pooled = self.model.forward_head(self.model.forward_features(x), pre_logits=True)
            return pooled, self.model.get_classifier()(pooled)

    return BundledTower


def BundledTower(model):  # noqa: N802 - a factory standing in for the lazily defined class
    """Wrap the bundled encoder's image model as pixels -> (pooled, logits)."""
    return _tower_class()(model).eval()


def torch_runner(tower):
    """pixels (NCHW tensor) -> list of numpy outputs, through a PyTorch module."""
    import torch

    def run(batch: "torch.Tensor") -> list[np.ndarray]:
        with torch.inference_mode():
            out = tower(batch)
        out = out if isinstance(out, (tuple, list)) else (out,)
        return [o.float().numpy() for o in out]

    return run


def quantize_linear_int8(tower):
    """``torch.ao.quantization.quantize_dynamic`` on every ``nn.Linear`` (int8 weights)."""
    import torch

    return torch.ao.quantization.quantize_dynamic(tower.eval(), {torch.nn.Linear}, dtype=torch.qint8)


def export_onnx(tower, path: Path, output_names: list[str], input_size: int) -> Path:
    """Export a tower to ONNX with ``torch.onnx.export`` (dynamic batch size)."""
    import warnings

    import torch

    example = torch.zeros(2, 3, input_size, input_size)
    axes = {"pixels": {0: "batch"}, **{name: {0: "batch"} for name in output_names}}
    with warnings.catch_warnings():  # the tracer's notes on constant shapes are noise for the user
        warnings.simplefilter("ignore")
        _export(tower, example, path, output_names, axes)
    return Path(path)


def _export(tower, example, path, output_names, axes) -> None:
    import torch

    torch.onnx.export(
        tower.eval(),
        (example,),
        str(path),
        input_names=["pixels"],
        output_names=list(output_names),
        dynamic_axes=axes,
        opset_version=17,
        dynamo=False,
    )


def quantize_onnx_int8(source: Path, target: Path) -> Path:
    """``onnxruntime.quantization.quantize_dynamic``: int8 weights, activations quantised at run time."""
    from onnxruntime.quantization import QuantType, quantize_dynamic

    quantize_dynamic(str(source), str(target), weight_type=QuantType.QInt8)
    return Path(target)


def onnx_session(path: Path, threads: int):
    """An ONNX Runtime CPU session with every graph optimisation and ``threads`` intra-op threads."""
    import onnxruntime as ort

    options = ort.SessionOptions()
    options.intra_op_num_threads = max(1, int(threads))
    options.inter_op_num_threads = 1
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    return ort.InferenceSession(str(path), sess_options=options, providers=["CPUExecutionProvider"])


def onnx_runner(path: Path, threads: int):
    """pixels (NCHW tensor) -> list of numpy outputs, through ONNX Runtime."""
    session = onnx_session(path, threads)

    def run(batch) -> list[np.ndarray]:
        pixels = np.ascontiguousarray(batch.numpy() if hasattr(batch, "numpy") else batch, dtype=np.float32)
        return session.run(None, {"pixels": pixels})

    return run


# -- the fast path offered: the float32 tower on ONNX Runtime ------------------------

#: The runtimes an encoder's image tower can run on (``[encoder] runtime``, ``--runtime``).
RUNTIMES = ("torch", "onnxruntime")
#: Families the onnxruntime path is offered for: where benchmarks/fast_path.py measured it
#: faster than exact end to end here (bundled x1.20; clip x0.82, so not offered).
OFFERED_FAMILIES = ("bundled",)
NOT_OFFERED = (
    "encoder runtime 'onnxruntime' is not offered for the clip encoder: benchmarks/fast_path.py "
    "measured it slower than the exact torch path end to end here (x0.82 through embed's streams); "
    "use runtime 'torch' (or --encoder bundled with --runtime onnxruntime)"
)
#: Bump when the export or the ONNX Runtime settings change the vectors.
ONNX_VERSION = 1
INSTALL_HINT = 'pip install "explore[fast]" (or: pip install onnxruntime onnx)'


def _require_onnxruntime():
    try:
        import onnx  # noqa: F401  (torch.onnx.export writes through it)
        import onnxruntime
    except ImportError as exc:
        from explore.encoders.base import EncoderUnavailable

        raise EncoderUnavailable(
            f"encoder runtime 'onnxruntime' needs the optional packages onnxruntime and onnx "
            f"({exc.name} is not installed); install them with {INSTALL_HINT}, "
            f"or use runtime 'torch' (the exact path)"
        ) from exc
    return onnxruntime


def onnx_cache_dir() -> Path:
    """Where exported towers are kept between runs (the bundled encoder's model cache)."""
    from explore.encoders.bundled import label_cache_dir

    return label_cache_dir() / "onnx"


class OnnxRuntimeEncoder:
    """An encoder whose image tower runs on ONNX Runtime (float32); text, preprocessing and
    everything else are the exact encoder's.

    The tower (clip: ``model.visual``; bundled: pixels -> pooled features and
    ImageNet logits) is exported once with ``torch.onnx.export`` and kept in
    ``onnx_cache_dir()`` under a name derived from the exact encoder's id and
    the torch version, on first use. Its id is the exact id plus ``-onnxruntime``, so its
    vectors never share cache entries with the exact path's.
    ``benchmarks/fast_path.py`` measured it faster here with cosine >= 0.999
    (README "Fast path").

    Parameters
    ----------
    base : the exact ``ClipEncoder`` or ``BundledEncoder``.

    Raises
    ------
    EncoderUnavailable : onnxruntime or onnx is not installed (says how to install).
    """

    runtime = "onnxruntime"

    def __init__(self, base):
        import hashlib
        import threading

        ort = _require_onnxruntime()
        self.base = base
        self.family = base.family
        self.input_size = base.input_size
        self.logit_scale = base.logit_scale
        self.logit_bias = base.logit_bias
        self.id = f"{base.id}-onnxruntime" + (f"{ONNX_VERSION}" if ONNX_VERSION > 1 else "")
        self.model_name = getattr(base, "model_name", base.family)
        self.onnxruntime_version = ort.__version__
        key = hashlib.sha256(f"{base.id}|{_torch_version()}|{ONNX_VERSION}".encode()).hexdigest()[:16]
        self.onnx_path = onnx_cache_dir() / f"{base.family}-tower-{key}.onnx"
        self._sessions: dict[int, object] = {}
        self._lock = threading.Lock()

    def _export(self) -> None:
        """Export the exact encoder's tower once (called under the lock, on first use)."""
        import os

        path = self.onnx_path
        if path.is_file():
            return
        base = self.base
        if base.family == "clip":
            tower, names = base.model.visual, ["embedding"]
        else:
            tower, names = BundledTower(base.model), ["pooled", "logits"]
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        try:
            export_onnx(tower, tmp, names, input_size=self.input_size)
            os.replace(tmp, path)
        finally:
            tmp.unlink(missing_ok=True)

    def __getattr__(self, name):  # weights, pretrained, label_embeddings, ...: the exact encoder's
        if name == "base":
            raise AttributeError(name)
        return getattr(self.base, name)

    def _session(self):
        """One session per thread count (embed's streams set torch's; the same is used here)."""
        import torch

        threads = max(1, torch.get_num_threads())
        with self._lock:
            self._export()
            if threads not in self._sessions:
                self._sessions[threads] = onnx_session(self.onnx_path, threads)
            return self._sessions[threads]

    def preprocess(self, image):
        return self.base.preprocess(image)

    def encode_images(self, batch) -> dict[str, np.ndarray]:
        """NCHW batch -> {"cluster", "joint"}, built as the exact encoder builds them from the tower's outputs."""
        pixels = np.ascontiguousarray(batch.numpy() if hasattr(batch, "numpy") else batch, dtype=np.float32)
        outs = self._session().run(None, {"pixels": pixels})
        if self.family == "clip":
            return clip_vectors(outs[0])
        return bundled_vectors(self.base, outs[0], outs[1])

    def encode_texts(self, texts: list[str]) -> np.ndarray:
        return self.base.encode_texts(texts)


def _torch_version() -> str:
    """torch's version without importing it (the exported tower depends on it)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("torch")
    except PackageNotFoundError:
        import torch

        return torch.__version__


def with_runtime(encoder, runtime: str):
    """``encoder`` unchanged for ``torch``; wrapped in ``OnnxRuntimeEncoder`` for ``onnxruntime``."""
    from explore.encoders.base import EncoderUnavailable

    runtime = (runtime or "torch").strip().lower()
    if runtime not in RUNTIMES:
        raise EncoderUnavailable(f"unknown encoder runtime '{runtime}'; expected one of {', '.join(RUNTIMES)}")
    if runtime == "torch":
        return encoder
    if encoder.family not in OFFERED_FAMILIES:
        raise EncoderUnavailable(NOT_OFFERED)
    return OnnxRuntimeEncoder(encoder)
