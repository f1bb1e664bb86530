"""Run a study end to end: every stage in data-flow order, tables written to disk.

This is the one place that knows the order of the stages. Each stage returns
named tables; this module writes them (CSV and Parquet) into the study's
output folder and records what was done in ``run.json``.
"""

from __future__ import annotations

import json
import time
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import pandas as pd

from explore.study import Study


@dataclass
class RunSummary:
    """What a run did, for printing and for ``run.json``."""

    study: str
    output: Path
    encoder_id: str = ""
    encoder_notice: str = ""
    images_found: int = 0
    images_used: int = 0
    images_skipped: int = 0
    images_embedded: int = 0
    stage_seconds: dict[str, float] = field(default_factory=dict)
    tables: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    report: Path | None = None


def write_tables(folder: Path, tables: dict[str, pd.DataFrame]) -> list[str]:
    """Write each table as NAME.csv and NAME.parquet; returns the names written."""
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name, table in tables.items():
        table.to_csv(folder / f"{name}.csv", index=False)
        table.to_parquet(folder / f"{name}.parquet", index=False)
        written.append(name)
    return written


def _jsonable(value):
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    return value


def study_encoder(study: Study, encoder_name: str | None = None, weights: Path | None = None):
    """The study's encoder, with command-line overrides; returns (encoder, notice)."""
    from explore.encoders import load_encoder

    settings = study.encoder
    return load_encoder(
        encoder_name or settings.name,
        model=settings.model,
        pretrained=settings.pretrained,
        weights=weights or settings.weights,
    )


def run_study(
    study: Study,
    *,
    encoder_name: str | None = None,
    weights: Path | None = None,
    progress: bool = True,
    log: Callable[[str], None] = print,
) -> RunSummary:
    """Run every stage of ``study`` and write its outputs.

    Parameters
    ----------
    study : the validated study.
    encoder_name : overrides ``study.encoder.name`` (e.g. from the command line).
    weights : overrides ``study.encoder.weights``.
    progress : show progress bars on long steps.
    log : where one-line notices go.

    Returns
    -------
    RunSummary
    """
    from explore import collect, embed

    out = study.output
    out.mkdir(parents=True, exist_ok=True)
    summary = RunSummary(study=study.name, output=out)
    timer = _StageTimer(summary)

    # compare: read the survey first, so a bad survey file fails before the slow stages.
    from explore import compare

    survey = compare.read_survey(study.survey.file) if study.survey.file else None

    from explore.cache import check_not_busy

    check_not_busy(out / "cache")  # refuse a concurrent run at once, before the slow steps

    with timer("collect"):
        images = collect.collect_study_images(study, progress=progress)
        log(collect.summarise(images))
        summary.images_found = len(images)
        summary.images_used = int((images["status"] == "ok").sum())
        summary.images_skipped = summary.images_found - summary.images_used
        summary.tables += write_tables(
            out, {"images": images, "skipped": collect.skipped_files(images)}
        )
        summary.notes.append(f"collect: {collect.poster_note(images)}")

    with timer("embed"):
        settings = study.encoder
        encoder, notice = study_encoder(study, encoder_name, weights)
        summary.encoder_id = encoder.id
        summary.encoder_notice = notice
        if notice:
            log(notice)
        embeddings, stats = embed.embed_table(
            images,
            encoder,
            cache_dir=out / "cache",
            batch_size=settings.batch_size,
            progress=progress,
        )
        summary.images_embedded = stats.embedded
        log(stats.describe())

    # The stages below run in data-flow order; each writes its tables with
    # write_tables(out, ...) and adds one-line notes for the run summary.

    # --- attributes (explore/attributes/): zero-shot scores, shares, gaps ---
    with timer("attributes"):
        from explore import attributes

        attribute_tables, attribute_notes = attributes.attribute_tables(
            images,
            embeddings.image_ids,
            embeddings.joint,
            embeddings.cluster,
            study.attributes,
            study.scoring,
            encoder,
            seed=study.seed,
            saved_checks=read_saved_checks(out),
        )
        summary.tables += write_tables(out, attribute_tables)
        summary.notes += [f"attributes: {note}" for note in attribute_notes]
    # --- end attributes --------------------------------------------------------

    # --- contexts (explore/contexts.py): UMAP + HDBSCAN, names, brand indices ---
    if len(embeddings.image_ids) >= 3:
        with timer("contexts"):
            from explore import contexts

            context_tables = contexts.run_contexts(
                images,
                embeddings.image_ids,
                embeddings.cluster,
                embeddings.joint,
                study.contexts,
                seed=study.seed,
                encode_texts=encoder.encode_texts,
                encoder_id=encoder.id,
            )
            summary.tables += write_tables(out, context_tables)
            summary.notes += contexts.describe(context_tables)
        # Context-adjusted attribute gaps need both stages, so they are joined here
        # (explore/attributes/context_adjust.py; attribute_gaps is rewritten with them).
        gaps = attributes.adjust_gaps_for_context(
            attribute_tables["attribute_gaps"],
            attribute_tables["image_attributes"],
            images,
            context_tables.get("image_contexts"),
            attribute_tables["attribute_shares"],
        )
        attribute_tables["attribute_gaps"] = gaps
        write_tables(out, {"attribute_gaps": gaps})
        summary.notes.append(f"attributes: {attributes.describe_gaps(gaps)}")
    else:
        summary.notes.append("contexts: skipped, fewer than 3 usable images")
        summary.notes.append(f"attributes: {attributes.describe_gaps(attribute_tables['attribute_gaps'])}")
    # --- end contexts ------------------------------------------------------------


    # --- compare (explore/compare.py): survey agreement, brand maps ---------
    if "attribute_shares" in summary.tables:
        with timer("compare"):
            compare_tables, compare_notes = compare.compare_study(
                attribute_tables["attribute_shares"],
                survey=survey,
                brand_categories=dict(zip(images["brand"], images["category"])),
                images=images,
                embeddings=embeddings,
            )
            summary.tables += write_tables(out, compare_tables)
            summary.notes += [f"compare: {note}" for note in compare_notes]
    # --- end compare ----------------------------------------------------------

    record = {
        "study": study.name,
        "study_file": str(study.path) if study.path else "",
        "written_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "encoder_id": summary.encoder_id,
        "encoder_notice": summary.encoder_notice,
        "counts": {
            "found": summary.images_found,
            "used": summary.images_used,
            "skipped": summary.images_skipped,
            "embedded_this_run": summary.images_embedded,
        },
        "stage_seconds": summary.stage_seconds,
        "settings": _jsonable(asdict(study)),
        "tables": summary.tables,
        "notes": summary.notes,
    }
    (out / "run.json").write_text(json.dumps(record, indent=2), encoding="utf-8")

    # --- report (explore/report/): one self-contained HTML file ----------------
    # Last, because it reads only the output folder (tables and run.json above).
    with timer("report"):
        from explore.report import write_report

        summary.report = write_report(out, study)
    # --- end report --------------------------------------------------------------
    return summary


class _StageTimer:
    """Context manager factory that records wall time per stage."""

    def __init__(self, summary: RunSummary):
        self.summary = summary

    def __call__(self, name: str):
        summary = self.summary

        class _Timer:
            def __enter__(self):
                self.start = time.perf_counter()

            def __exit__(self, *exc):
                summary.stage_seconds[name] = round(time.perf_counter() - self.start, 2)
                return False

        return _Timer()


# --- check (explore/attributes/): attributes against hand labels -----------

#: In the output folder: what ``explore check --save-threshold/--save-probe`` stored,
#: {attribute name: record}; later runs use it for those attributes.
SAVED_CHECKS_FILE = "attribute_checks.json"


def read_saved_checks(out: Path) -> dict:
    """The saved checks of an output folder ({} when there are none)."""
    path = Path(out) / SAVED_CHECKS_FILE
    if not path.is_file():
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        from explore.study import StudyError

        raise StudyError(f"{path}: not a valid saved-checks file ({exc}); delete it or run the check again")
    return data if isinstance(data, dict) else {}


def check_study(
    study: Study,
    labels_path: Path,
    *,
    encoder_name: str | None = None,
    weights: Path | None = None,
    save_threshold: bool = False,
    save_probe: bool = False,
    progress: bool = True,
    log: Callable[[str], None] = print,
) -> list:
    """Check the study's attributes against hand labels (``explore check``).

    Collects and embeds the study's images (through the cache, so a run before
    makes this quick), reads the labels CSV (columns image, attribute, label),
    checks every labelled attribute, writes the ``attribute_check`` tables
    and, when asked, saves thresholds or linear probes for later runs.

    Returns
    -------
    list of ``attributes.AttributeCheck``, one per labelled attribute.
    """
    from explore import attributes, collect, embed
    from explore.study import StudyError

    labels_path = Path(labels_path)
    if not labels_path.is_file():
        raise FileNotFoundError(f"{labels_path}: labels file not found")
    try:
        table = pd.read_csv(labels_path, dtype=str, keep_default_na=False)
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as exc:
        raise StudyError(f"{labels_path}: not a readable CSV file: {exc}") from exc

    out = study.output
    out.mkdir(parents=True, exist_ok=True)
    images = collect.collect_study_images(study, progress=progress)
    labels, warnings = attributes.read_labels(
        table, images, [a.name for a in study.attributes], where=str(labels_path), base=labels_path.parent
    )
    for line in warnings:
        log(line)
    settings = study.encoder
    encoder, notice = study_encoder(study, encoder_name, weights)
    if notice:
        log(notice)
    embeddings, stats = embed.embed_table(
        images, encoder, cache_dir=out / "cache", batch_size=settings.batch_size, progress=progress
    )
    log(stats.describe())
    row_of = {image_id: i for i, image_id in enumerate(embeddings.image_ids)}

    saved_all = read_saved_checks(out)
    results, to_save = [], {}
    for attribute in study.attributes:
        mine = labels[labels["attribute"] == attribute.name]
        if mine.empty:
            continue
        rows = [row_of[i] for i in mine["image_id"]]
        vectors = attributes.attribute_vectors(attribute, study.scoring.templates, encoder.encode_texts)
        saved = {k: v for k, v in (saved_all.get(attribute.name) or {}).items() if k != "probe"}
        saved, note = attributes.usable_check(saved or None, encoder.id, attributes.prompts_digest(vectors))
        if note:
            log(f"attribute '{attribute.name}': {note}")
        threshold, threshold_from = attributes.resolve_threshold(attribute, study.scoring, saved)
        result = attributes.check_attribute(
            attribute,
            vectors,
            mine["label"].to_numpy(),
            embeddings.joint[rows],
            embeddings.cluster[rows],
            encoder,
            threshold,
            threshold_from,
            seed=study.seed,
        )
        results.append(result)
        record, said = attributes.saved_record(result, save_threshold=save_threshold, save_probe=save_probe)
        if record is not None:
            record["saved_at"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
            record["labels_file"] = str(labels_path)
            to_save[attribute.name] = record
        if said:
            log(said)
    if not results:
        raise StudyError(f"{labels_path}: no usable labels for any attribute of the study")
    write_tables(out, attributes.checks_table(results))
    if to_save:
        saved_all.update(to_save)
        path = out / SAVED_CHECKS_FILE
        tmp = path.with_suffix(".json.tmp")
        tmp.write_text(json.dumps(saved_all, indent=2), encoding="utf-8")
        tmp.replace(path)
    return results


# --- end check -----------------------------------------------------------------
