"""Run a study end to end: every stage in data-flow order, tables written to disk.

This is the one place that knows the order of the stages. Each stage returns
named tables; this module writes them (CSV and Parquet) and records what was
done in ``run.json``. A run first checks every setting, file and folder it
needs (``preflight``), then takes the output folder's lock, writes everything
into a staging folder and publishes it in one step at the end
(``explore.output``), so the output folder always holds one complete run.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import pandas as pd

from explore.output import OutputLock, Staging, pause_point, write_tables
from explore.study import Study, StudyError

__all__ = ["RunSummary", "run_study", "check_study", "preflight", "write_tables", "read_saved_checks"]


@dataclass
class RunSummary:
    """What a run did, for printing and for ``run.json``."""

    study: str
    output: Path
    run_id: str = ""
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
        runtime=settings.runtime,
    )


def run_study(
    study: Study,
    *,
    encoder_name: str | None = None,
    weights: Path | None = None,
    labels_path: Path | None = None,
    progress: bool = True,
    log: Callable[[str], None] = print,
) -> RunSummary:
    """Run every stage of ``study`` and publish its outputs in one step.

    Checks the study first (``preflight``), takes the output folder's lock
    (``output.OutputBusy`` when another command holds it), writes every table,
    ``run.json`` and the report into a staging folder and makes them current
    only when all stages succeeded. A failure leaves the previous results as
    they were.

    Parameters
    ----------
    study : the validated study.
    encoder_name : overrides ``study.encoder.name`` (e.g. from the command line).
    weights : overrides ``study.encoder.weights``.
    labels_path : hand labels (overrides the study's ``[labels] file``): the run
        checks each labelled attribute (``attribute_check`` tables) and, from
        random labels, writes corrected shares beside the yes-rates.
    progress : show progress bars on long steps.
    log : where one-line notices go.

    Returns
    -------
    RunSummary
    """
    survey = preflight(study, weights=weights)
    labels_path = labels_path or study.labels.file
    label_table = read_labels_file(labels_path) if labels_path else None  # a bad file fails early too
    if label_table is not None:
        for line in label_attributes_preflight(label_table, study, labels_path):
            log(line)
    final = Path(study.output)
    with OutputLock(final, "run") as lock:
        summary = RunSummary(study=study.name, output=final, run_id=lock.run_id)
        for note in lock.notes:
            log(note)
        summary.notes += lock.notes
        staging = Staging(final, lock.run_id)
        try:
            out = staging.create()
            probe_writable(final / "cache")
            _run_stages(
                study, out, summary, survey, encoder_name, weights, progress, log, labels_path, label_table
            )
            staging.publish()
        except BaseException:
            staging.discard()
            raise
    if summary.report is not None:
        summary.report = final / summary.report.name
    return summary


#: In the cache folder: per content (sha256), the commercial flag's plain border share.
PLAIN_CACHE = "plain_border.parquet"


def read_measures(path: Path, version: str) -> dict[str, float]:
    """{sha256: value} measured by an earlier run under ``version`` ({} when none or unreadable)."""
    try:
        table = pd.read_parquet(path)
        table = table[table["version"] == version]
        return dict(zip(table["sha256"].astype(str), table["value"].astype(float)))
    except Exception:  # missing, damaged or of another layout: measure again
        return {}


def write_measures(path: Path, version: str, values: dict[str, float]) -> None:
    """Keep ``values`` for the next run (atomic; unchanged values are not rewritten)."""
    if not values or read_measures(path, version) == values:
        return
    table = pd.DataFrame({"sha256": list(values), "value": list(values.values())})
    table["version"] = version
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        table.to_parquet(tmp, index=False)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def skip_changed(images: pd.DataFrame, skipped: dict) -> pd.DataFrame:
    """The images table with the rows of ``skipped`` (sha256 -> (status, reason)) marked as skipped."""
    images = images.copy()
    for sha, (status, reason) in skipped.items():
        rows = (images["sha256"] == sha) & (images["status"] == "ok")
        images.loc[rows, "status"] = status
        images.loc[rows, "reason"] = f"{reason} (during the run)"
    return images


def _commercial_constants() -> dict:
    """The commercial-post flag's fixed constants, for run.json (the study key is under settings.images)."""
    from explore import commercial

    return {k: getattr(commercial, k) for k in ("THRESHOLD", "COEF_PLAIN", "COEF_MARGIN", "INTERCEPT", "TOLERANCE",
                                                 "BORDER", "COMMERCIAL_PROMPTS", "PHOTO_PROMPTS")}


def probe_writable(folder: Path) -> None:
    """Write, fsync and remove a real file in ``folder``: the OSError names the folder's problem."""
    folder.mkdir(parents=True, exist_ok=True)
    probe = folder / f".write-probe-{os.getpid()}"
    try:
        with open(probe, "wb") as f:
            f.write(b"explore write probe\n")
            f.flush()
            os.fsync(f.fileno())
    finally:
        probe.unlink(missing_ok=True)


def preflight(study: Study, weights: Path | None = None):
    """Check every setting and input file a run needs, before anything is read or written.

    Fast (no images read, no model loaded), so a mistake fails at once with the
    file, the key and what was expected. Returns the survey table (or None).

    Raises
    ------
    StudyError (or ``compare.SurveyError``) naming the file and key.
    """
    from explore.study import check_report_settings

    where = str(study.path) if study.path else "<study>"
    check_report_settings(study.report, where)
    images = study.images
    if images.manifest is not None:
        if not Path(images.manifest).is_file():
            raise StudyError(f"{where}: key 'images.manifest': {images.manifest} is not a file")
    elif images.root is not None and not Path(images.root).is_dir():
        raise StudyError(f"{where}: key 'images.root': {images.root} is not a folder")
    if images.root is not None and images.manifest is not None and not Path(images.root).is_dir():
        raise StudyError(f"{where}: key 'images.root': {images.root} is not a folder")
    weights = weights or study.encoder.weights
    if weights is not None and not Path(weights).is_file():
        raise StudyError(f"{where}: key 'encoder.weights' (or --weights): {weights} is not a file")
    from explore import contexts

    try:
        contexts.load_vocabulary(study.contexts)
    except (ValueError, OSError) as exc:
        key = "contexts.vocabulary" if study.contexts.vocabulary is not None else "contexts.extra_phrases"
        raise StudyError(f"{where}: key '{key}': {str(exc).removeprefix('contexts: ')}") from None
    output = Path(study.output)
    if output.exists() and not output.is_dir():
        raise StudyError(f"{where}: key 'output': {output} is a file; expected a folder (or a path to create)")
    read_saved_checks(output)
    from explore import compare

    return compare.read_survey(study.survey.file) if study.survey.file else None


def _run_stages(
    study: Study, out: Path, summary: RunSummary, survey, encoder_name, weights, progress, log,
    labels_path=None, label_table=None,
) -> None:
    """The stages in data-flow order, writing into ``out`` (the staging folder)."""
    from explore import collect, compare, embed
    from explore.cache import check_not_busy

    timer = _StageTimer(summary)
    check_not_busy(out / "cache")  # refuse a concurrent embed at once, before the slow steps

    with timer("collect"):
        images = collect.collect_study_images(study, progress=progress)
        log(collect.summarise(images))
        summary.images_found = len(images)
        summary.images_used = int((images["status"] == "ok").sum())
        summary.images_skipped = summary.images_found - summary.images_used
        summary.tables += write_tables(out, {"images": images, "skipped": collect.skipped_files(images)})
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
            cluster=study.cluster,
        )
        summary.images_embedded = stats.embedded
        log(stats.describe())
        if stats.skipped:  # images that changed since collect: listed as skipped, the run goes on
            images = skip_changed(images, stats.skipped)
            write_tables(out, {"images": images, "skipped": collect.skipped_files(images)})
            summary.images_used = int((images["status"] == "ok").sum())
            summary.images_skipped = summary.images_found - summary.images_used
            for sha, (status, reason) in stats.skipped.items():
                where = ", ".join(images.loc[images["sha256"] == sha, "relpath"].astype(str))
                note = f"embed: {where}: skipped, {reason} ({status})"
                log(note)
                summary.notes.append(note)
        for note in stats.notes:  # cache repairs (a damaged shard set aside and re-embedded)
            log(f"embed: {note}")
            summary.notes.append(f"embed: {note}")

    with timer("near-duplicates"):
        from explore import duplicates

        images, embeddings, near_notes = duplicates.confirm_near_duplicates(
            images,
            embeddings,
            exclude=getattr(study.images, "near_duplicates", "exclude") == "exclude",
            exclude_reposts=getattr(study.images, "reposts", "exclude") == "exclude",
        )
        summary.notes += near_notes
        # Reposts are known only now: the same file (collect) and near-copies (confirmed above).
        reposts = collect.repost_summary(images)
        for row in reposts.itertuples():
            near = f"{row.near_copies} near-cop{'y' if row.near_copies == 1 else 'ies'}"
            summary.notes.append(
                f"reposts: {row.brand}: {row.reposts} of {row.consumer_files} consumer photos are reposts of "
                f"its own photos ({row.same_file} same file, {near}; "
                f"{'left out of' if row.excluded else 'kept in'} consumer shares), e.g. {row.examples}"
            )
        summary.tables += write_tables(out, {"reposts": reposts})

    with timer("commercial posts"):
        from explore import commercial

        plain_path = out / "cache" / PLAIN_CACHE
        known_plain = read_measures(plain_path, commercial.PLAIN_VERSION)
        images, embeddings, commercial_notes = commercial.flag_commercial(
            images, embeddings, encoder.encode_texts, mode=getattr(study.images, "commercial_posts", "exclude"),
            log=log, known_plain=known_plain,
        )
        measured = images.loc[images["commercial_plain"].notna(), ["sha256", "commercial_plain"]]
        known_plain.update(zip(measured["sha256"], measured["commercial_plain"]))
        write_measures(plain_path, commercial.PLAIN_VERSION, known_plain)
        summary.notes += commercial_notes
        for note in commercial_notes:
            log(note)
        summary.images_used = int((images["status"] == "ok").sum())
        summary.images_skipped = summary.images_found - summary.images_used
        write_tables(out, {"images": images, "skipped": collect.skipped_files(images)})

    # The stages below run in data-flow order; each writes its tables with
    # write_tables(out, ...) and adds one-line notes for the run summary.

    # --- attributes (explore/attributes/): zero-shot scores, shares, gaps ---
    with timer("attributes"):
        from explore import attributes

        labels = None
        if label_table is not None:
            labels, warnings = attributes.read_labels(
                label_table, images, [a.name for a in study.attributes], where=str(labels_path),
                base=Path(labels_path).parent,
            )
            for line in warnings:
                log(line)
            summary.notes += [f"labels: {w}" for w in warnings[:20]]
            if len(warnings) > 20:
                summary.notes.append(f"labels: ... and {len(warnings) - 20} more rows left out")
            results, _ = check_labels(study, labels, embeddings, encoder, log=log)
            if results:
                summary.tables += write_tables(out, attributes.checks_table(results))
                summary.notes += [f"check: {r.headline()}" for r in results]
        attribute_tables, attribute_notes = attributes.attribute_tables(
            images,
            embeddings.image_ids,
            embeddings.joint,
            embeddings.cluster,
            study.attributes,
            study.scoring,
            encoder,
            seed=study.seed,
            saved_checks=read_saved_checks(study.output),
            labels=labels,
        )
        summary.tables += write_tables(out, attribute_tables)
        summary.notes += [f"attributes: {note}" for note in attribute_notes]
    # --- end attributes --------------------------------------------------------

    # --- contexts (explore/contexts/): UMAP + HDBSCAN, names, brand indices ---
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
                image_attributes=attribute_tables.get("image_attributes"),
                seed=study.seed,
            )
            summary.tables += write_tables(out, compare_tables)
            summary.notes += [f"compare: {note}" for note in compare_notes]
    # --- end compare ----------------------------------------------------------

    record = {
        "run_id": summary.run_id,
        "output": str(study.output),
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
        "commercial_flag": _commercial_constants(),
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


class _StageTimer:
    """Context manager factory that records wall time per stage."""

    def __init__(self, summary: RunSummary):
        self.summary = summary

    def __call__(self, name: str):
        summary = self.summary

        class _Timer:
            def __enter__(self):
                self.start = time.perf_counter()

            def __exit__(self, kind, value, tb):
                summary.stage_seconds[name] = round(time.perf_counter() - self.start, 2)
                if kind is None:
                    pause_point(name)  # a test hook at every stage boundary (explore.output)
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


def read_labels_file(path: Path) -> pd.DataFrame:
    """Read a labels CSV (BOM, semicolons and header case handled); errors name the file."""
    from explore.attributes import parse_labels_text
    from explore.study import StudyError

    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"{path}: labels file not found")
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise StudyError(f"{path}: not UTF-8 text ({exc}); save the labels as UTF-8 CSV") from exc
    return parse_labels_text(text, where=str(path))


def label_attributes_preflight(table: pd.DataFrame, study: Study, labels_path) -> list[str]:
    """Match the labels file's attribute names with the study's before any photo is read.

    A file that names none of the study's attributes stops the command at once
    (the usual cause: a labels file of another study, or a renamed attribute);
    names the study does not have are listed in one line, and their rows are
    left out later with the other row checks.

    Raises
    ------
    StudyError naming the file, the names it has and the study's names.
    """
    from explore.attributes.labels import unguard

    if "attribute" not in table.columns:
        return []  # the row checks name the missing column
    known = [a.name for a in study.attributes]
    counts = table["attribute"].astype(str).str.strip().map(unguard).value_counts()
    counts = counts[counts.index != ""]
    unknown = [name for name in counts.index if name not in known]
    if len(counts) and len(unknown) == len(counts):
        from explore.study import StudyError

        shown = ", ".join(f"'{name}'" for name in unknown[:8]) + (" ..." if len(unknown) > 8 else "")
        raise StudyError(
            f"{labels_path}: no label names an attribute of the study; the file names {shown}; "
            f"the study has {', '.join(repr(k) for k in known) or 'no attributes'} "
            "(add them to the study, or use --attribute NAME: POSITIVE / NEGATIVE)"
        )
    if unknown:
        listed = ", ".join(f"'{name}' ({counts[name]} row{'s' if counts[name] != 1 else ''})" for name in unknown[:8])
        return [f"labels: {labels_path}: attributes not in the study, their rows left out: {listed}"]
    return []


def check_labels(study: Study, labels: pd.DataFrame, embeddings, encoder, *, log: Callable[[str], None] = print):
    """Check every labelled attribute (shared by ``explore check`` and ``explore run``).

    The reported AUC and accuracy come from the random-sample labels when the
    file records a random sample (``sample == "random"``); thresholds and the
    probe are fitted on all labels, boundary ones included.

    Returns
    -------
    (results, records): the ``AttributeCheck`` per labelled attribute, and
    {attribute: what ``--save-...`` would store}.
    """
    from explore import attributes

    row_of = {image_id: i for i, image_id in enumerate(embeddings.image_ids)}
    saved_all = read_saved_checks(study.output)
    results, records = [], {}
    for attribute in study.attributes:
        mine = labels[labels["attribute"] == attribute.name]
        mine = mine[mine["image_id"].isin(row_of)]
        if mine.empty:
            continue
        vectors = attributes.attribute_vectors(attribute, study.scoring.templates, encoder.encode_texts)
        saved = {k: v for k, v in (saved_all.get(attribute.name) or {}).items() if k != "probe"}
        saved, note = attributes.usable_check(saved or None, encoder.id, attributes.prompts_digest(vectors))
        if note:
            log(f"attribute '{attribute.name}': {note}")
        threshold, threshold_from = attributes.resolve_threshold(attribute, study.scoring, saved)

        def run_check(part):
            rows = [row_of[i] for i in part["image_id"]]
            return attributes.check_attribute(
                attribute, vectors, part["label"].to_numpy(), embeddings.joint[rows], embeddings.cluster[rows],
                encoder, threshold, threshold_from, seed=study.seed,
                grades=part["grade"].to_numpy(float) if "grade" in part else None,
            )

        random = mine[mine["sample"] == "random"] if "sample" in mine else mine.iloc[0:0]
        result = run_check(random if len(random) else mine)
        result.sampled = attributes.describe_sample(mine)
        if len(random) and len(random) < len(mine):
            fitted = run_check(mine)  # thresholds and probe may use the boundary labels too
            result.record = fitted.record
            result.probe_auc, result.probe_auc_low, result.probe_auc_high = (
                fitted.probe_auc, fitted.probe_auc_low, fitted.probe_auc_high)
            result.probe_note = fitted.probe_note or "cross-validated on all labels, boundary sample included"
        results.append(result)
        records[attribute.name] = result
    return results, records


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
    makes this quick), reads the labels CSV (columns image, attribute, label,
    and the sample design when a labelling sheet wrote it), checks every
    labelled attribute, writes the ``attribute_check`` tables and, when asked,
    saves thresholds or linear probes for later runs.

    Returns
    -------
    list of ``attributes.AttributeCheck``, one per labelled attribute.
    """
    labels_path = Path(labels_path)
    table = read_labels_file(labels_path)
    preflight(study, weights=weights)
    for line in label_attributes_preflight(table, study, labels_path):
        log(line)
    final = Path(study.output)
    with OutputLock(final, "check") as lock:
        for note in lock.notes:
            log(note)
        staging = Staging(final, lock.run_id)
        try:
            out = staging.create()
            probe_writable(final / "cache")
            results = _check_in(
                study, out, final, table, labels_path, encoder_name, weights, save_threshold, save_probe,
                progress, log,
            )
            staging.publish(remove_previous_tables=False)
        except BaseException:
            staging.discard()
            raise
    return results


def _check_in(
    study, out, final, table, labels_path, encoder_name, weights, save_threshold, save_probe, progress, log
) -> list:
    """The body of ``check_study``, writing into ``out`` (a staging folder) and reading ``final``."""
    from explore import attributes, collect, embed
    from explore.study import StudyError

    images = collect.collect_study_images(study, progress=progress)
    labels, warnings = attributes.read_labels(
        table, images, [a.name for a in study.attributes], where=str(labels_path), base=labels_path.parent
    )
    for line in warnings:
        log(line)
    if labels.empty:
        detail = "; ".join(warnings[:3])
        raise StudyError(f"{labels_path}: no usable labels for any attribute of the study" + (f" ({detail})" if detail else ""))
    for line in attributes.prevalence_labels(labels, where=str(labels_path))[1]:
        log(line)
    settings = study.encoder
    encoder, notice = study_encoder(study, encoder_name, weights)
    if notice:
        log(notice)
    embeddings, stats = embed.embed_table(
        images, encoder, cache_dir=out / "cache", batch_size=settings.batch_size, progress=progress
    )
    log(stats.describe())

    results, _ = check_labels(study, labels, embeddings, encoder, log=log)
    saved_all = read_saved_checks(final)
    to_save = {}
    for result in results:
        record, said = attributes.saved_record(result, save_threshold=save_threshold, save_probe=save_probe)
        if record is not None:
            record["saved_at"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
            record["labels_file"] = str(labels_path)
            to_save[result.attribute] = record
        if said:
            log(said)
    if not results:
        raise StudyError(f"{labels_path}: no usable labels for any attribute of the study")
    write_tables(out, attributes.checks_table(results))
    if to_save:
        saved_all.update(to_save)
        (out / SAVED_CHECKS_FILE).write_text(json.dumps(saved_all, indent=2), encoding="utf-8")
    return results


# --- end check -----------------------------------------------------------------
