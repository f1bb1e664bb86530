"""The study file: a TOML document turned into validated dataclasses.

A study names the image sources, the brands and their categories, the encoder,
the attributes to score and the settings of every stage. Every key has a
default except the image source; an unknown key or a value of the wrong kind
is refused with the file, the key and what was expected, so a typo never
silently falls back to a default.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, get_args, get_origin, get_type_hints

ENCODER_NAMES = ("auto", "bundled", "clip")
DEFAULT_CLIP_MODEL = "ViT-B-32-256"  # chosen by evidence: explore.encoders.catalogue.choose_default
DEFAULT_CLIP_PRETRAINED = "datacomp_s34b_b86k"
DEFAULT_TEMPLATES = ["a photo that feels {}", "a picture that looks {}", "{}"]


class StudyError(ValueError):
    """A study file (or a value meant for one) is not valid."""


@dataclass
class ImagesSettings:
    """Where the images come from.

    root: folder tree ``ROOT/<brand>/<source>/...``, or the folder that manifest
        paths are relative to (and may not escape).
    manifest: optional CSV with columns path, brand, source[, category, posted_at,
        poster, any extra columns].
    metadata: optional sidecar CSV for a folder tree: path (relative to root),
        poster, posted_at and any extra columns.
    max_per_poster: at most this many usable photos per poster within each
        brand x source, a seeded sample (0, the default: no cap).
    reposts: what to do with a brand's owned photo found again in its consumer
        set, the same file or a near-copy (content hash and image vectors,
        ``explore/duplicates.py``): ``exclude`` (default: status ``repost``, so
        consumer shares describe what consumers posted themselves) or ``keep``
        (counted as a consumer photo too). Either way it is reported.
    near_duplicates: a near-identical picture in the same brand and source
        (confirmed by the image vectors, ``explore/duplicates.py``): ``exclude``
        (default: counted once, later copies get status ``near_duplicate``) or
        ``keep`` (flag only).
    commercial_posts: a consumer photo that looks like a shop listing, product
        shot, screenshot or advert (``explore/commercial.py``): ``exclude``
        (default: status ``commercial``, left out of the consumer shares) or
        ``keep`` (flagged, counted). Owned photos are never flagged.
    """

    root: Path | None = None
    manifest: Path | None = None
    metadata: Path | None = None
    max_per_poster: int = 0
    reposts: str = "exclude"
    near_duplicates: str = "exclude"
    commercial_posts: str = "exclude"


@dataclass
class EncoderSettings:
    """Which encoder turns images and texts into vectors.

    runtime: what runs the image tower: ``torch`` (default, the exact path) or
        ``onnxruntime`` (the same float32 tower exported to ONNX and run by ONNX
        Runtime; bundled encoder only, where ``benchmarks/fast_path.py``
        measured it faster here with cosine >= 0.999 with torch; its vectors
        get their own encoder id; ``pip install "explore[fast]"``).
    """

    name: str = "auto"
    model: str = DEFAULT_CLIP_MODEL
    pretrained: str = DEFAULT_CLIP_PRETRAINED
    weights: Path | None = None
    batch_size: int = 32
    runtime: str = "torch"


ENCODER_RUNTIMES = ("torch", "onnxruntime")


@dataclass
class ClusterSettings:
    """Where embedding runs: here (default) or on a Ray cluster (``pip install "explore[cluster]"``).

    address: "" = this machine only; "auto" = a Ray cluster already running on
        this machine (``ray start --head``); "HOST:PORT" = a cluster's head
        node; "ray://HOST:10001" = Ray client; "local" = start a private Ray
        instance on this machine for the run.
    workers: embedding workers (each loads the model once); 0 = one per CPU
        of the cluster.
    transfer: "auto" (workers read the image paths when they can see them,
        else the driver sends the bytes), "path" or "bytes".
    """

    address: str = ""
    workers: int = 0
    transfer: str = "auto"


CLUSTER_TRANSFERS = ("auto", "path", "bytes")


@dataclass
class Attribute:
    """An attribute to score zero-shot: a name and descriptions of both sides."""

    name: str
    positive: list[str]
    negative: list[str]
    threshold: float | None = None


@dataclass
class ScoringSettings:
    """How attribute descriptions become prompts and probabilities become calls."""

    templates: list[str] = field(default_factory=lambda: list(DEFAULT_TEMPLATES))
    threshold: float = 0.5
    bootstrap_samples: int = 1000


@dataclass
class ContextEdit:
    """One analyst edit of the contexts a run found (``[[contexts.edits]]``).

    The context is named by ``context`` (its number in the run's contexts
    table) or by ``image`` (an image it contains, by image_id or path
    relative to the images root: this survives a re-run that numbers
    contexts differently). Exactly one action: ``name`` (rename),
    ``merge_into`` (a context number or an image of the context that absorbs
    this one) or ``drop = true`` (its photos become unassigned).
    """

    context: int | None = None
    image: str | None = None
    name: str | None = None
    merge_into: int | str | None = None
    drop: bool = False
    #: 1-based position among the file's [[contexts.edits]] tables, for messages.
    position: int = 0

    def target(self) -> str:
        return f"context {self.context}" if self.context is not None else f"the context of image '{self.image}'"


@dataclass
class ContextSettings:
    """Settings of context discovery (UMAP + HDBSCAN) and brand x context tests.

    ``None`` for min_cluster_size, min_samples or neighbours means: scale with
    the number of images n (the values used are recorded with the results in
    the ``contexts`` table; see ``explore.contexts.resolve_parameters``):
    neighbours = round(sqrt(n) / 2) within [30, 50]; min_cluster_size = 0.5 %
    of n within [20, 500]; min_samples = min(min_cluster_size, 10).

    cluster_selection: HDBSCAN cluster selection, "leaf" (default: finer,
        more homogeneous contexts) or "eom" (HDBSCAN's own default).
    cluster_dimensions: UMAP dimensions HDBSCAN clusters in (default 10).
    fit_sample: above this many images UMAP and HDBSCAN are fitted on a
        seeded sample of this size; every other image is placed from its
        nearest sampled images and given a context by HDBSCAN's
        approximate_predict (default 20000).
    vocabulary, extra_phrases, replace_vocabulary: the phrases contexts are
        named from (default: explore/data/context_vocabulary.txt, extended by
        the file and the extra phrases; replaced when replace_vocabulary).
    exemplars: images listed per context, nearest its centre (default 6).
    fdr: Benjamini-Hochberg false-discovery level (default 0.05).
    min_index: smallest index that counts as an over-index (default 120).
    min_count: fewest images of the brand in the context (default 5).
    rare_category_share: below this category share a context is "rare" for
        the category, so a brand over-indexing there is unexpected (0.05).
    dominance_ratio: another category "dominates" a context when its share
        is the highest and at least this many times the brand's category
        share (default 2.0).
    """

    min_cluster_size: int | None = None
    min_samples: int | None = None
    neighbours: int | None = None
    cluster_selection: str = "leaf"
    cluster_dimensions: int = 10
    fit_sample: int = 20000
    vocabulary: Path | None = None
    extra_phrases: list[str] = field(default_factory=list)
    replace_vocabulary: bool = False
    exemplars: int = 6
    fdr: float = 0.05
    min_index: float = 120.0
    min_count: int = 5
    rare_category_share: float = 0.05
    dominance_ratio: float = 2.0
    #: Analyst edits applied after the contexts are found ([[contexts.edits]]).
    edits: list[ContextEdit] = field(default_factory=list)


@dataclass
class SurveySettings:
    """Optional survey perception scores (CSV: brand, attribute, score, ...)."""

    file: Path | None = None


@dataclass
class LabelsSettings:
    """Optional hand labels (CSV written by ``explore label``'s sheet, or by hand).

    ``file``: image, attribute, label (and the sample design columns). A run
    with labels checks each labelled attribute and, from random labels,
    estimates corrected shares.
    """

    file: Path | None = None


@dataclass
class ReportSettings:
    """The self-contained HTML report."""

    thumbnail_px: int = 112
    max_thumbnails: int = 5000  # keeps a 100k-image report under 30 MB (benchmarks/report_size.py)
    #: Blur detected faces in the report's pictures (``explore/report/faces.py``);
    #: the vectors always come from the original photos.
    blur_faces: bool = True


@dataclass
class Study:
    """One analysis: image sources, brands, encoder, attributes, settings."""

    name: str
    path: Path | None
    output: Path
    images: ImagesSettings
    seed: int = 0
    brands: dict[str, str] = field(default_factory=dict)
    encoder: EncoderSettings = field(default_factory=EncoderSettings)
    cluster: ClusterSettings = field(default_factory=ClusterSettings)
    scoring: ScoringSettings = field(default_factory=ScoringSettings)
    attributes: list[Attribute] = field(default_factory=list)
    contexts: ContextSettings = field(default_factory=ContextSettings)
    survey: SurveySettings = field(default_factory=SurveySettings)
    labels: LabelsSettings = field(default_factory=LabelsSettings)
    report: ReportSettings = field(default_factory=ReportSettings)

    def category_of(self, brand: str) -> str:
        """The brand's category as declared in ``[brands]``, else ``"all"``."""
        return self.brands.get(brand, "all")


# --------------------------------------------------------------------------
# Reading and validating


_TOP_LEVEL_KEYS = {
    "name": "a text",
    "output": "a folder path",
    "seed": "a whole number",
    "images": "a table",
    "brands": "a table of brand = category",
    "encoder": "a table",
    "cluster": "a table",
    "scoring": "a table",
    "attribute": "an array of tables ([[attribute]])",
    "contexts": "a table",
    "survey": "a table",
    "labels": "a table",
    "report": "a table",
}


def load_study(path: str | Path) -> Study:
    """Read and validate a study file.

    Parameters
    ----------
    path : the TOML study file. Relative paths inside it are relative to it.

    Returns
    -------
    Study

    Raises
    ------
    StudyError naming the file, the key and what was expected.
    """
    path = Path(path)
    if not path.is_file():
        raise StudyError(f"{path}: study file not found")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise StudyError(f"{path}: not valid TOML: {exc}") from exc
    except UnicodeDecodeError as exc:
        raise StudyError(f"{path}: not UTF-8 text: {exc}") from exc
    return study_from_dict(raw, path)


def study_from_dict(raw: dict[str, Any], path: Path | None = None) -> Study:
    """Validate a parsed study document; ``path`` anchors relative paths."""
    where = str(path) if path else "<study>"
    base = path.parent if path else Path.cwd()
    for key in raw:
        if key not in _TOP_LEVEL_KEYS:
            raise StudyError(
                f"{where}: unknown key '{key}'; expected one of: {', '.join(_TOP_LEVEL_KEYS)}"
            )

    name = _expect(raw.get("name", path.stem if path else "study"), str, where, "name")
    seed = _expect(raw.get("seed", 0), int, where, "seed")
    output = _resolve(Path(_expect(raw.get("output", "outputs"), str, where, "output")), base)

    images = _section(raw, "images", ImagesSettings, where, base)
    if images.root is None and images.manifest is None:
        raise StudyError(f"{where}: [images] needs 'root' (a folder) or 'manifest' (a CSV file)")
    if images.max_per_poster < 0:
        raise StudyError(f"{where}: key 'images.max_per_poster' must be 0 (no cap) or more")
    if images.metadata is not None and images.manifest is not None:
        raise StudyError(
            f"{where}: keys 'images.metadata' and 'images.manifest' exclude each other; "
            f"put poster and extra columns in the manifest"
        )
    if images.manifest is not None and images.root is None:
        images.root = images.manifest.parent
    if images.reposts not in ("exclude", "keep"):
        raise StudyError(
            f"{where}: key 'images.reposts' is '{images.reposts}'; expected 'exclude' or 'keep'"
        )
    if images.near_duplicates not in ("exclude", "keep"):
        raise StudyError(
            f"{where}: key 'images.near_duplicates' is '{images.near_duplicates}'; expected 'exclude' or 'keep'"
        )
    if images.commercial_posts not in ("exclude", "keep"):
        raise StudyError(
            f"{where}: key 'images.commercial_posts' is '{images.commercial_posts}'; expected 'exclude' or 'keep'"
        )

    brands_raw = raw.get("brands", {})
    if not isinstance(brands_raw, dict):
        raise StudyError(f"{where}: key 'brands' must be a table of brand = category")
    brands = {}
    for brand, category in brands_raw.items():
        brands[str(brand)] = _expect(category, str, where, f"brands.{brand}")

    encoder = _section(raw, "encoder", EncoderSettings, where, base)
    if encoder.name not in ENCODER_NAMES:
        raise StudyError(
            f"{where}: key 'encoder.name' is '{encoder.name}'; expected one of {', '.join(ENCODER_NAMES)}"
        )
    if encoder.batch_size < 1:
        raise StudyError(f"{where}: key 'encoder.batch_size' must be at least 1")
    if encoder.runtime not in ENCODER_RUNTIMES:
        raise StudyError(
            f"{where}: key 'encoder.runtime' is '{encoder.runtime}'; expected one of {', '.join(ENCODER_RUNTIMES)}"
        )

    cluster = _section(raw, "cluster", ClusterSettings, where, base)
    if cluster.workers < 0:
        raise StudyError(f"{where}: key 'cluster.workers' must be 0 (one per CPU) or more")
    if cluster.transfer not in CLUSTER_TRANSFERS:
        raise StudyError(
            f"{where}: key 'cluster.transfer' is '{cluster.transfer}'; expected one of {', '.join(CLUSTER_TRANSFERS)}"
        )

    scoring = _section(raw, "scoring", ScoringSettings, where, base)
    if not 0.0 < scoring.threshold < 1.0:
        raise StudyError(f"{where}: key 'scoring.threshold' must lie strictly between 0 and 1")
    for template in scoring.templates:
        check_template(template, f"{where}: key 'scoring.templates'")

    attr_raw = raw.get("attribute", [])
    if not isinstance(attr_raw, list):
        raise StudyError(f"{where}: key 'attribute' must be an array of tables ([[attribute]])")
    attributes = [_attribute(item, where, i) for i, item in enumerate(attr_raw)]
    check_attributes(attributes, where)

    contexts_raw = dict(raw.get("contexts", {})) if isinstance(raw.get("contexts", {}), dict) else raw.get("contexts")
    edits_raw = contexts_raw.pop("edits", []) if isinstance(contexts_raw, dict) else []
    contexts = _section({"contexts": contexts_raw}, "contexts", ContextSettings, where, base)
    contexts.edits = _context_edits(edits_raw, where)
    check_context_settings(contexts, where)
    survey = _section(raw, "survey", SurveySettings, where, base)
    labels = _section(raw, "labels", LabelsSettings, where, base)
    report = _section(raw, "report", ReportSettings, where, base)
    check_report_settings(report, where)

    return Study(
        name=name,
        path=path,
        output=output,
        images=images,
        seed=seed,
        brands=brands,
        encoder=encoder,
        cluster=cluster,
        scoring=scoring,
        attributes=attributes,
        contexts=contexts,
        survey=survey,
        labels=labels,
        report=report,
    )


def _context_edits(raw: Any, where: str) -> list[ContextEdit]:
    """Parse ``[[contexts.edits]]``: each names one context and one action; errors name the edit."""
    if not isinstance(raw, list) or not all(isinstance(t, dict) for t in raw):
        raise StudyError(f"{where}: key 'contexts.edits' must be an array of tables ([[contexts.edits]])")
    allowed = ("context", "image", "name", "merge_into", "drop")
    edits = []
    for i, table in enumerate(raw, start=1):
        key = f"contexts.edits[{i}]"
        unknown = [k for k in table if k not in allowed]
        if unknown:
            raise StudyError(f"{where}: unknown key '{key}.{unknown[0]}'; expected one of: {', '.join(allowed)}")
        if ("context" in table) == ("image" in table):
            raise StudyError(f"{where}: {key} needs exactly one of 'context' (a context number) or "
                             "'image' (an image id or path in the context)")
        actions = [k for k in ("name", "merge_into", "drop") if k in table]
        if len(actions) != 1:
            raise StudyError(f"{where}: {key} needs exactly one action: 'name', 'merge_into' or 'drop = true'")
        edit = ContextEdit(position=i)
        if "context" in table:
            edit.context = _expect(table["context"], int, where, f"{key}.context", "a context number (1 or more)")
            if edit.context < 1:
                raise StudyError(f"{where}: key '{key}.context' is {edit.context}; expected a context number (1 or more)")
        else:
            edit.image = _expect(table["image"], str, where, f"{key}.image", "an image id or path").strip()
        if "name" in table:
            edit.name = _expect(table["name"], str, where, f"{key}.name", "a text").strip()
            if not edit.name:
                raise StudyError(f"{where}: key '{key}.name' is empty; expected the context's new name")
        if "merge_into" in table:
            value = table["merge_into"]
            if isinstance(value, bool) or not isinstance(value, (int, str)) or (isinstance(value, int) and value < 1):
                raise StudyError(f"{where}: key '{key}.merge_into' is {value!r}; expected a context number "
                                 "or an image id or path of the context to merge into")
            edit.merge_into = value.strip() if isinstance(value, str) else value
        if "drop" in table:
            if _expect(table["drop"], bool, where, f"{key}.drop", "true") is not True:
                raise StudyError(f"{where}: key '{key}.drop' is false; leave the edit out instead")
            edit.drop = True
        edits.append(edit)
    return edits


def check_context_settings(settings: ContextSettings, where: str) -> None:
    """Refuse context settings outside their meaningful range, naming the key."""
    minimum = {
        "min_cluster_size": 2, "min_samples": 1, "neighbours": 2, "cluster_dimensions": 2,
        "fit_sample": 100, "exemplars": 0, "min_count": 0,
    }
    for key, low in minimum.items():
        value = getattr(settings, key)
        if value is not None and value < low:
            raise StudyError(f"{where}: key 'contexts.{key}' is {value}; it must be at least {low}")
    if settings.cluster_selection not in ("leaf", "eom"):
        raise StudyError(
            f"{where}: key 'contexts.cluster_selection' is '{settings.cluster_selection}'; expected leaf or eom"
        )
    if not 0.0 < settings.fdr < 1.0:
        raise StudyError(f"{where}: key 'contexts.fdr' must lie strictly between 0 and 1")
    if not 0.0 <= settings.rare_category_share <= 1.0:
        raise StudyError(f"{where}: key 'contexts.rare_category_share' must lie between 0 and 1")
    if settings.min_index < 0 or settings.dominance_ratio < 1.0:
        raise StudyError(
            f"{where}: keys 'contexts.min_index' (>= 0) and 'contexts.dominance_ratio' (>= 1) are out of range"
        )


def check_report_settings(settings: ReportSettings, where: str) -> None:
    """Refuse report settings outside their range (checked on load, not after the slow stages)."""
    if not 16 <= settings.thumbnail_px <= 512:
        raise StudyError(
            f"{where}: key 'report.thumbnail_px' is {settings.thumbnail_px}; expected a size between 16 and 512 pixels"
        )
    if settings.max_thumbnails < 0:
        raise StudyError(f"{where}: key 'report.max_thumbnails' is {settings.max_thumbnails}; expected 0 or more")


def check_template(template: str, where: str) -> None:
    """A template must hold exactly one empty ``{}`` field."""
    import string

    try:
        fields = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise StudyError(f"{where}: template '{template}' is malformed: {exc}") from exc
    if fields != [""]:
        raise StudyError(
            f"{where}: template '{template}' must contain exactly one '{{}}' and no named fields"
        )


def check_attributes(attributes: list[Attribute], where: str) -> None:
    """Refuse empty sides, empty descriptions and duplicate names, naming the attribute."""
    seen: set[str] = set()
    for attr in attributes:
        label = f"{where}: attribute '{attr.name}'"
        if not attr.name.strip():
            raise StudyError(f"{where}: an attribute has an empty name")
        if attr.name in seen:
            raise StudyError(f"{label} is defined twice")
        seen.add(attr.name)
        for side in ("positive", "negative"):
            texts = getattr(attr, side)
            if not texts:
                raise StudyError(f"{label} has no {side} description")
            if any(not t.strip() for t in texts):
                raise StudyError(f"{label} has an empty {side} description")
            for text in texts:
                if "{" in text or "}" in text:
                    raise StudyError(
                        f"{label}: {side} description '{text}' contains a brace; "
                        "fields such as {} belong in scoring.templates, not in descriptions"
                    )
        if attr.threshold is not None and not 0.0 < attr.threshold < 1.0:
            raise StudyError(f"{label}: threshold must lie strictly between 0 and 1")


def _attribute(item: Any, where: str, index: int) -> Attribute:
    if not isinstance(item, dict):
        raise StudyError(f"{where}: attribute #{index + 1} must be a table")
    name = item.get("name")
    label = f"attribute '{name}'" if name else f"attribute #{index + 1}"
    allowed = {f.name for f in dataclasses.fields(Attribute)}
    for key in item:
        if key not in allowed:
            raise StudyError(
                f"{where}: {label}: unknown key '{key}'; expected one of: {', '.join(sorted(allowed))}"
            )
    if not isinstance(name, str):
        raise StudyError(f"{where}: {label}: key 'name' must be a text")

    def texts(key: str) -> list[str]:
        value = item.get(key, [])
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise StudyError(f"{where}: {label}: key '{key}' must be a text or a list of texts")
        return value

    threshold = item.get("threshold")
    if threshold is not None and (isinstance(threshold, bool) or not isinstance(threshold, (int, float))):
        raise StudyError(f"{where}: {label}: key 'threshold' must be a number")
    return Attribute(
        name=name,
        positive=texts("positive"),
        negative=texts("negative"),
        threshold=float(threshold) if threshold is not None else None,
    )


def _section(raw: dict, key: str, cls: type, where: str, base: Path):
    """Build the dataclass ``cls`` from table ``raw[key]``, checking keys and kinds."""
    table = raw.get(key, {})
    if not isinstance(table, dict):
        raise StudyError(f"{where}: key '{key}' must be a table")
    hints = get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    values = {}
    for sub, value in table.items():
        if sub not in hints:
            raise StudyError(
                f"{where}: unknown key '{key}.{sub}'; expected one of: {', '.join(names)}"
            )
        values[sub] = _coerce(value, hints[sub], where, f"{key}.{sub}", base)
    return cls(**values)


def _coerce(value: Any, hint: Any, where: str, key: str, base: Path) -> Any:
    optional = False
    args = get_args(hint)
    if type(None) in args:
        optional = True
        hint = next(a for a in args if a is not type(None))
    if optional and (value is None or value == ""):
        return None
    if hint is Path:
        return _resolve(Path(_expect(value, str, where, key, "a path")), base)
    if get_origin(hint) is list:
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise StudyError(f"{where}: key '{key}' must be a list of texts")
        return list(value)
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise StudyError(f"{where}: key '{key}' is {value!r}; expected a number")
        return float(value)
    if hint is int:
        return _expect(value, int, where, key, "a whole number")
    if hint is bool:
        return _expect(value, bool, where, key, "true or false")
    if hint is str:
        return _expect(value, str, where, key, "a text")
    raise StudyError(f"{where}: key '{key}' has an unsupported type")  # pragma: no cover


def _expect(value: Any, kind: type, where: str, key: str, what: str | None = None) -> Any:
    ok = isinstance(value, kind) and not (kind is int and isinstance(value, bool))
    if not ok:
        what = what or {str: "a text", int: "a whole number", bool: "true or false"}.get(kind, kind.__name__)
        raise StudyError(f"{where}: key '{key}' is {value!r}; expected {what}")
    return value


def _resolve(p: Path, base: Path) -> Path:
    p = p.expanduser()
    return p if p.is_absolute() else (base / p).resolve()
