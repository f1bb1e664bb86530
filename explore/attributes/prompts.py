"""Prompt pairs: attribute definitions from the command line, prompts, text vectors.

An attribute is a name with descriptions of its positive and its negative side.
Each side becomes one text vector by prompt ensembling (Radford et al. 2021,
"Learning Transferable Visual Models From Natural Language Supervision"):
every description is put into every template ("a photo that feels {}"), the
texts are encoded, and the mean of the normalised text vectors is normalised
again.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from explore.study import Attribute, StudyError, check_attributes, check_template


# --------------------------------------------------------------------------
# Defining attributes on the command line


def parse_attribute_spec(spec: str) -> Attribute:
    """Turn a one-line attribute definition into an :class:`Attribute`.

    The line reads ``NAME: positive; positive ... / negative; negative ...``:
    the name, a colon, the positive descriptions separated by semicolons, one
    slash, the negative descriptions separated by semicolons. For example
    ``"sunny: bright sunshine; a clear blue sky / grey overcast weather; rain"``.

    Parameters
    ----------
    spec : the text given to ``--attribute``.

    Returns
    -------
    Attribute

    Raises
    ------
    StudyError naming the attribute (or quoting the text when it has no name).
    """
    if ":" not in spec:
        raise StudyError(
            f"--attribute '{spec}': expected 'NAME: positive; ... / negative; ...' (no colon found)"
        )
    name, _, body = spec.partition(":")
    name = name.strip()
    if not name:
        raise StudyError(f"--attribute '{spec}': the attribute has an empty name before the colon")
    label = f"--attribute '{name}'"
    sides = body.split("/")
    if len(sides) != 2:
        raise StudyError(
            f"{label}: expected exactly one '/' between the positive and the negative "
            f"descriptions, found {len(sides) - 1}"
        )

    def descriptions(text: str, side: str) -> list[str]:
        parts = [p.strip() for p in text.split(";")]
        if not any(parts):
            raise StudyError(f"{label} has no {side} description")
        if any(not p for p in parts):
            raise StudyError(f"{label} has an empty {side} description (two ';' in a row or a trailing ';')")
        return parts

    attribute = Attribute(
        name=name,
        positive=descriptions(sides[0], "positive"),
        negative=descriptions(sides[1], "negative"),
    )
    check_attributes([attribute], "--attribute")
    return attribute


def add_attributes(existing: list[Attribute], extra: Sequence[Attribute], where: str) -> list[Attribute]:
    """The study's attributes followed by ``extra``; refuses a name used twice."""
    combined = list(existing) + list(extra)
    check_attributes(combined, where)
    return combined


# --------------------------------------------------------------------------
# Prompts and text vectors


def build_prompts(descriptions: Sequence[str], templates: Sequence[str]) -> list[str]:
    """Every description in every template, description-major order."""
    for template in templates:
        check_template(template, "scoring.templates")
    return [template.format(d) for d in descriptions for template in templates]


def ensemble(vectors: np.ndarray) -> np.ndarray:
    """Mean of the L2-normalised rows, normalised again (prompt ensembling)."""
    v = np.asarray(vectors, dtype=np.float64)
    v = v / np.linalg.norm(v, axis=1, keepdims=True)
    mean = v.mean(axis=0)
    return (mean / np.linalg.norm(mean)).astype(np.float32)


@dataclass
class AttributeVectors:
    """The text side of one attribute: both side vectors and one vector per description."""

    name: str
    positive: np.ndarray  # (d,)
    negative: np.ndarray  # (d,)
    positive_prompts: list[str]
    negative_prompts: list[str]
    #: (side, description, vector) for every single description, templates ensembled.
    descriptions: list[tuple[str, str, np.ndarray]] = field(default_factory=list)


def attribute_vectors(
    attribute: Attribute,
    templates: Sequence[str],
    encode_texts: Callable[[list[str]], np.ndarray],
) -> AttributeVectors:
    """Encode an attribute's prompts (one call) and ensemble each side.

    Parameters
    ----------
    attribute : the attribute.
    templates : description templates, each with one ``{}``.
    encode_texts : the encoder's ``encode_texts`` (texts -> L2-normalised rows).
    """
    templates = list(templates) or ["{}"]
    pos_prompts = build_prompts(attribute.positive, templates)
    neg_prompts = build_prompts(attribute.negative, templates)
    vectors = np.asarray(encode_texts(pos_prompts + neg_prompts), dtype=np.float32)
    pos_v, neg_v = vectors[: len(pos_prompts)], vectors[len(pos_prompts):]
    t = len(templates)
    singles = []
    for side, texts, block in (("positive", attribute.positive, pos_v), ("negative", attribute.negative, neg_v)):
        for i, text in enumerate(texts):
            singles.append((side, text, ensemble(block[i * t:(i + 1) * t])))
    return AttributeVectors(
        name=attribute.name,
        positive=ensemble(pos_v),
        negative=ensemble(neg_v),
        positive_prompts=pos_prompts,
        negative_prompts=neg_prompts,
        descriptions=singles,
    )


def prompts_digest(vectors: AttributeVectors) -> str:
    """Short digest of an attribute's prompts: a saved check applies only to the same prompts."""
    text = "\n".join(vectors.positive_prompts) + "\n/\n" + "\n".join(vectors.negative_prompts)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]
