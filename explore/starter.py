"""A starter study file for a folder of photos (``explore init FOLDER``).

A new user points ``explore init`` at a folder laid out as
``ROOT/<brand>/<source>/...`` and gets a study file that names the brands and
sources found there, the default attribute set (the five brand-personality
dimensions of Aaker, 1997, Journal of Marketing Research, worded as our own
prompt pairs), encoder ``auto`` and an output folder, so that the next command
(``explore run STUDY``) already produces results. Every other study key is
written too, with its default from ``explore.study`` and a short comment
(``SETTINGS_WRITTEN``; keys that are off or automatic by default are written
commented out, with an example value), so the user can see what to change.
"""

from __future__ import annotations

import os
from pathlib import Path

from explore.printable import UNSAFE, printable
from explore.study import StudyError

#: Aaker's (1997) five brand-personality dimensions as prompt pairs of our own
#: wording: (name, positive descriptions, negative descriptions).
DEFAULT_ATTRIBUTES: list[tuple[str, list[str], list[str]]] = [
    # Each description names the quality and a concrete scene that shows it, so
    # that encoders which see objects rather than moods (the bundled ImageNet
    # encoder) can score it too.
    ("sincerity",
     ["honest, wholesome and down-to-earth", "sincere and homely, like a simple breakfast at home"],
     ["showy, artificial and insincere", "slick and calculated, like a staged spectacle"]),
    ("excitement",
     ["exciting, lively and daring", "spirited and full of fun, like a party with balloons and music"],
     ["dull, quiet and routine", "uneventful, like an ordinary working day"]),
    ("competence",
     ["competent, reliable and hard-working", "capable and professional, like a well-organised desk at work"],
     ["careless, unreliable and idle", "messy and amateurish, idle and disorganised"]),
    ("sophistication",
     ["sophisticated, elegant and refined", "glamorous and upscale, like fine dining with wine by candlelight"],
     ["plain, casual and unrefined", "cheap and basic, like an ordinary everyday snack"]),
    ("ruggedness",
     ["rugged, tough and outdoorsy",
      "hardy and wild, like a camping expedition with tents and axes in the mountains"],
     ["delicate, soft and indoorsy", "dainty and pampered, like a cosy afternoon on soft cushions"]),
]

_SOURCE_NAMES = ("consumer", "owned")


def find_brands(folder: Path) -> dict[str, list[str]]:
    """Brands (first-level folders) and the source folders found under each.

    Hidden folders are ignored. Source folder names are matched without regard
    to case, like the collect stage does.
    """
    found: dict[str, list[str]] = {}
    for brand_dir in sorted(p for p in folder.iterdir() if p.is_dir() and not p.name.startswith(".")):
        sources = sorted(
            p.name.lower() for p in brand_dir.iterdir() if p.is_dir() and p.name.lower() in _SOURCE_NAMES
        )
        found[brand_dir.name] = sources
    return found


def _toml_string(text: str) -> str:
    """A TOML basic string: quotes, backslashes and every unsafe character escaped.

    TOML refuses raw control characters, and bidi controls would reorder what
    the user reads, so both are written as ``\\uXXXX`` escapes: the value read
    back is the exact folder name.
    """
    escaped = text.replace("\\", "\\\\").replace('"', '\\"')
    escaped = UNSAFE.sub(lambda m: f"\\u{ord(m.group(0)):04X}", escaped)
    return f'"{escaped}"'


def _toml_key(key: str) -> str:
    bare = key and all(c.isalnum() or c in "-_" for c in key) and key.isascii()
    return key if bare else _toml_string(key)


#: Every study key ``explore init`` writes after the ones it fills in itself
#: (name, output, seed, images.root, brands, attributes): section -> key ->
#: (comment, example). With an example the key is written commented out (its
#: default is "off" or automatic, which TOML cannot spell), else with its
#: default from ``explore.study``. tests/test_starter.py checks that every key
#: the study loader knows is here.
SETTINGS_WRITTEN: dict[str, dict[str, tuple[str, object]]] = {
    "images": {
        "manifest": ("manifest CSV instead of the folder tree (path, brand, source[, category, posted_at, poster])", "photos.csv"),
        "metadata": ("folder tree only: a CSV of path, poster, posted_at and extra columns", "posters.csv"),
        "max_per_poster": ("at most this many photos per poster per brand x source (0 = no cap)", None),
        "reposts": ("a brand's own photo re-posted in its consumer set (the same file or a near-copy): exclude from consumer shares, or keep", None),
        "near_duplicates": ("near-identical pictures within a brand and source count once (exclude) or keep", None),
        "commercial_posts": ("consumer photos that look like shop listings, product shots, screenshots or adverts: exclude from consumer shares, or keep (flagged, counted)", None),
    },
    "encoder": {
        "name": ("auto (clip when its weights are here or can be downloaded, else bundled) | bundled | clip", None),
        "model": ("open_clip model name (clip); see `explore encoders`", None),
        "pretrained": ("open_clip pretrained tag (clip)", None),
        "weights": ("a local open_clip checkpoint file (clip)", "weights.safetensors"),
        "batch_size": ("images per batch", None),
        "runtime": ("torch (exact) | onnxruntime (bundled only: faster, own encoder id; pip install \"explore[fast]\")", None),
    },
    "cluster": {
        "address": ("embed on a Ray cluster: auto | HOST:PORT | ray://HOST:10001 | local (default: this machine)", "local"),
        "workers": ("Ray embedding workers (0 = one per CPU of the cluster)", None),
        "transfer": ("auto | path (a folder every node mounts) | bytes (the driver sends the files)", None),
    },
    "scoring": {
        "templates": ("how each description becomes prompts; {} is the description", None),
        "threshold": ("probability at which an image counts as positive", None),
        "bootstrap_samples": ("resamples for intervals of mean probabilities", None),
    },
    "contexts": {
        "min_cluster_size": ("default: automatic, 0.5 % of the images, between 20 and 500", 25),
        "min_samples": ("HDBSCAN min_samples; default: automatic", 10),
        "neighbours": ("UMAP neighbours; default: automatic, sqrt(n)/2 between 30 and 50", 30),
        "cluster_selection": ("HDBSCAN cluster selection: leaf (finer) or eom", None),
        "cluster_dimensions": ("UMAP dimensions used for clustering", None),
        "fit_sample": ("above this many images, UMAP and HDBSCAN are fitted on a seeded sample", None),
        "vocabulary": ("file of context phrases, one a line (default: the shipped list)", "phrases.txt"),
        "extra_phrases": ("phrases added to the vocabulary", None),
        "replace_vocabulary": ("true: name contexts from vocabulary and extra_phrases only", None),
        "exemplars": ("exemplar images per context", None),
        "fdr": ("Benjamini-Hochberg false-discovery level", None),
        "min_index": ("smallest index that counts as over-indexing (100 = parity)", None),
        "min_count": ("smallest image count behind a finding", None),
        "rare_category_share": ("a category rarely shows a context below this share", None),
        "dominance_ratio": ("another category dominates a context at this multiple of the brand's category share", None),
        "edits": ("rename, merge or drop contexts a run found, by number (context = N) or by an image in them (image = ID or path): name = ..., merge_into = N or image, drop = true", [{"image": "Brand/consumer/photo.jpg", "name": "breakfast at home"}]),
    },
    "survey": {
        "file": ("survey CSV: brand, attribute, score[, category, sample_size]", "survey.csv"),
    },
    "labels": {
        "file": ("hand labels (explore label's export): checks and corrected shares", "labels.csv"),
    },
    "report": {
        "thumbnail_px": ("side of the report's thumbnails, pixels", None),
        "max_thumbnails": ("beyond this, a seeded sample stratified by brand x source x context, plus all exemplars", None),
        "blur_faces": ("blur detected faces in the report's pictures (the vectors use the originals)", None),
    },
}


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + " }"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return _toml_string(str(value))


def _settings_lines(section: str, header: bool = True) -> list[str]:
    """One section's keys with their defaults (from ``explore.study``) and comments."""
    from explore import study as study_mod

    defaults = {
        "images": study_mod.ImagesSettings(), "encoder": study_mod.EncoderSettings(),
        "cluster": study_mod.ClusterSettings(), "scoring": study_mod.ScoringSettings(),
        "contexts": study_mod.ContextSettings(), "survey": study_mod.SurveySettings(),
        "labels": study_mod.LabelsSettings(), "report": study_mod.ReportSettings(),
    }[section]
    lines = [f"[{section}]"] if header else []
    for key, (comment, example) in SETTINGS_WRITTEN[section].items():
        if example is not None:
            text = f"# {key} = {_toml_value(example)}"
        else:
            text = f"{key} = {_toml_value(getattr(defaults, key))}"
        lines.append(f"{text:<32} # {comment}" if len(text) < 32 else f"{text}  # {comment}")
    return lines


def starter_study_text(folder: str | Path, study_path: str | Path | None = None) -> str:
    """The text of a starter study file for the photos under ``folder``.

    Parameters
    ----------
    folder : the images root, laid out as ``ROOT/<brand>/<source>/...`` with
        source folders ``consumer`` and/or ``owned``.
    study_path : where the study file will be written (default
        ``FOLDER/study.toml``); paths inside the file are made relative to it.

    Returns
    -------
    str : TOML text that ``explore.study.load_study`` accepts.

    Raises
    ------
    StudyError when the folder does not exist or holds no brand folder with a
    ``consumer`` or ``owned`` folder inside.
    """
    folder = Path(folder).expanduser().resolve()
    if not folder.is_dir():
        raise StudyError(f"{folder}: not a folder")
    study_path = Path(study_path).expanduser().resolve() if study_path else folder / "study.toml"
    brands = find_brands(folder)
    usable = {b: s for b, s in brands.items() if s}
    if not usable:
        raise StudyError(
            f"{folder}: no brand folders with a 'consumer' or 'owned' folder inside; "
            "expected the layout FOLDER/<brand>/<consumer|owned>/<images>"
        )
    base = study_path.parent
    root = Path(os.path.relpath(folder, base)).as_posix()
    output = Path(os.path.relpath(folder.parent / f"{folder.name}-results", base)).as_posix()

    lines = [
        f"# Starter study written by `explore init` for {printable(folder.name)}/.",
        "# Edit freely; every key is described in the README. Run it with:",
        f"#   explore run {printable(Path(os.path.relpath(study_path, Path.cwd())).as_posix())}",
        "",
        f"name = {_toml_string(folder.name)}",
        f"output = {_toml_string(output)}",
        "seed = 0",
        "",
        "[images]",
        f"root = {_toml_string(root)}",
        *_settings_lines("images", header=False),
        "",
        "# Each brand's category (brands of one category are compared with each",
        "# other). All brands start in one category; rename categories as needed.",
        "[brands]",
    ]
    for brand, sources in usable.items():
        lines.append(f"{_toml_key(brand)} = \"all\"  # sources found: {', '.join(sources)}")
    skipped = [b for b, s in brands.items() if not s]
    if skipped:
        lines.append(
            "# Folders without a 'consumer' or 'owned' folder inside (their files are listed as skipped): "
            + ", ".join(printable(b) for b in skipped)
        )
    lines += ["", *_settings_lines("encoder"), "", *_settings_lines("cluster"), "", *_settings_lines("scoring")]
    lines += ["", "# Attributes: Aaker's (1997) five brand-personality dimensions, as prompt pairs."]
    for i, (name, positive, negative) in enumerate(DEFAULT_ATTRIBUTES):
        lines += [
            "",
            "[[attribute]]",
            f"name = {_toml_string(name)}",
            "positive = [" + ", ".join(_toml_string(t) for t in positive) + "]",
            "negative = [" + ", ".join(_toml_string(t) for t in negative) + "]",
        ]
        if i == 0:
            lines.append("# threshold = 0.5                # optional: this attribute's own threshold ([scoring] threshold otherwise)")
    for section in ("contexts", "survey", "labels", "report"):
        lines += ["", *_settings_lines(section)]
    return "\n".join(lines) + "\n"


def write_starter_study(folder: str | Path, out: str | Path | None = None, force: bool = False) -> Path:
    """Write the starter study for ``folder`` to ``out`` (default FOLDER/study.toml).

    Refuses to replace an existing file unless ``force`` is true.
    """
    folder = Path(folder)
    out = Path(out) if out else folder / "study.toml"
    if out.exists() and not force:
        raise StudyError(f"{out}: already exists; pass --force to replace it")
    text = starter_study_text(folder, out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    return out
