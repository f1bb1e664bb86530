"""A starter study file for a folder of photos (``explore init FOLDER``).

A new user points ``explore init`` at a folder laid out as
``ROOT/<brand>/<source>/...`` and gets a study file that names the brands and
sources found there, the default attribute set (the five brand-personality
dimensions of Aaker, 1997, Journal of Marketing Research, worded as our own
prompt pairs), encoder ``auto`` and an output folder, so that the next command
(``explore run STUDY``) already produces results. The file is written as text
with comments, so the user can see what to change.
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
    lines += [
        "",
        "[encoder]",
        '# "auto" uses CLIP when its weights are on this machine, else the bundled encoder.',
        'name = "auto"',
        "",
        "# Attributes: Aaker's (1997) five brand-personality dimensions, as prompt pairs.",
    ]
    for name, positive, negative in DEFAULT_ATTRIBUTES:
        lines += [
            "",
            "[[attribute]]",
            f"name = {_toml_string(name)}",
            "positive = [" + ", ".join(_toml_string(t) for t in positive) + "]",
            "negative = [" + ", ".join(_toml_string(t) for t in negative) + "]",
        ]
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
