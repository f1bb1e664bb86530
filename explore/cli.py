"""Command line: parse arguments, call the stages, print progress. Kept thin.

Heavy libraries (torch, open_clip, umap, hdbscan, bokeh) are imported only by
the commands that need them, so ``explore --help`` answers at once.
"""

from __future__ import annotations

import argparse
import errno
import sys
from pathlib import Path

from explore import __version__

DEMO_STUDY = Path(__file__).resolve().parent.parent / "demo_images" / "study.toml"


def say(*parts, file=None) -> None:
    """print, with control and bidi characters in names made visible (``explore.printable``)."""
    from explore.printable import printable

    print(printable(" ".join(str(p) for p in parts), keep_newlines=True), file=file or sys.stdout)


def _add_encoder_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--encoder",
        choices=["auto", "bundled", "clip"],
        help="encoder family (default: the study's, else auto = clip when its weights are "
        "present locally or can be downloaded now, otherwise bundled)",
    )
    p.add_argument("--weights", type=Path, help="local open_clip checkpoint file for --encoder clip")
    p.add_argument(
        "--runtime",
        choices=["torch", "onnxruntime"],
        help="what runs the image tower: torch (exact, the default) or onnxruntime (bundled encoder "
        "only: x1.2 end to end here, cosine >= 0.999 with torch, its own encoder id; "
        "pip install \"explore[fast]\"). "
        "Default: the study's [encoder] runtime",
    )


# --- cluster options (explore/embed_ray.py) ---------------------------------------
RAY_HELP = (
    "embed new images on a Ray cluster (needs pip install \"explore[cluster]\"): 'auto' = a "
    "cluster already running on this machine (ray start --head), HOST:PORT = a cluster's head "
    "node, ray://HOST:10001 = Ray client, 'local' = a private Ray instance on this machine for "
    "this run. Workers read the images at the same paths (a folder every node mounts), else the "
    "driver sends the bytes. Default: the study's [cluster] address, else this machine without Ray"
)


def _add_cluster_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--ray", metavar="ADDRESS", help=RAY_HELP)
    p.add_argument("--ray-workers", type=int, metavar="N", help="Ray embedding workers (default: one per cluster CPU)")


def _cluster_settings(args, settings=None):
    """The study's [cluster] settings with --ray/--ray-workers applied; refuses at once without Ray."""
    from dataclasses import replace

    from explore.study import ClusterSettings, StudyError

    settings = settings or ClusterSettings()
    if getattr(args, "ray", None):
        settings = replace(settings, address=args.ray)
    if getattr(args, "ray_workers", None) is not None:
        if args.ray_workers < 1:
            raise StudyError(f"--ray-workers must be at least 1, got {args.ray_workers}")
        settings = replace(settings, workers=args.ray_workers)
    if settings.address:
        from explore.embed_ray import require_ray

        require_ray()
    return settings
# --- end cluster options -----------------------------------------------------------


# --- attributes options (explore/attributes/) ---------------------------------
ATTRIBUTE_HELP = (
    "add an attribute for this command only, without editing the study file; repeatable. "
    "Write it on one line as 'NAME: positive; positive ... / negative; negative ...': the name, "
    "a colon, the descriptions of the positive side separated by semicolons, one slash, the "
    "descriptions of the negative side. Example: --attribute \"sunny: bright sunshine; a clear "
    "blue sky / grey overcast weather; rain\". The study's templates apply to it as to the others."
)


def _add_attribute_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--attribute", action="append", default=[], metavar="'NAME: POS; ... / NEG; ...'",
                   help=ATTRIBUTE_HELP)


def _with_extra_attributes(study, specs: list[str]):
    """The study with the ``--attribute`` definitions added (refusing bad or duplicate ones)."""
    from explore.attributes import add_attributes, parse_attribute_spec

    if specs:
        extra = [parse_attribute_spec(spec) for spec in specs]
        study.attributes = add_attributes(study.attributes, extra, "--attribute (with the study's attributes)")
    return study
LABELS_HELP = (
    "hand labels CSV (overrides the study's [labels] file): the run checks each labelled "
    "attribute and, from labels drawn at random (`explore label`), writes corrected shares "
    "beside the model's yes-rates"
)


def _add_labels_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--labels", type=Path, default=None, help=LABELS_HELP)
# --- end attributes options -----------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="explore",
        description="How brands are portrayed in photos: zero-shot attributes, usage "
        "contexts, consumer vs owned comparisons, and a self-contained HTML report.",
    )
    parser.add_argument("--version", action="version", version=f"explore {__version__}")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser(
        "encoders",
        help="list encoder families, whether each can run here, and the catalogue of CPU-worthy clip models",
    )
    p.set_defaults(func=cmd_encoders)

    p = sub.add_parser(
        "fetch-model",
        help="download clip weights ahead of time (verified) and say which file to copy to an offline machine",
    )
    p.add_argument(
        "model", nargs="?", metavar="MODEL[/TAG]",
        help="open_clip model and pretrained tag, e.g. ViT-B-32/datacomp_xl_s13b_b90k (default: the default model)",
    )
    p.add_argument("--to", type=Path, metavar="FOLDER", help="also copy the file into FOLDER, ready to carry over")
    p.set_defaults(func=cmd_fetch_model)

    p = sub.add_parser(
        "embed",
        help="find images under a folder (or in a manifest CSV) and cache their vectors",
    )
    p.add_argument("source", type=Path, help="images root ROOT/<brand>/<source>/... or a manifest .csv")
    p.add_argument("--out", type=Path, required=True, help="output folder (the cache lives in OUT/cache)")
    p.add_argument("--model", default=None, help="open_clip model name (clip only)")
    p.add_argument("--pretrained", default=None, help="open_clip pretrained tag (clip only)")
    p.add_argument("--batch-size", type=int, default=32)
    _add_encoder_options(p)
    _add_cluster_options(p)
    p.set_defaults(func=cmd_embed)

    p = sub.add_parser("run", help="run a study end to end (every stage, reusing the cache)")
    p.add_argument("study", type=Path, help="study file (.toml)")
    _add_labels_option(p)
    _add_encoder_options(p)
    _add_cluster_options(p)
    _add_attribute_option(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("demo", help="run the shipped demo study (fictional brands) end to end")
    _add_labels_option(p)
    _add_encoder_options(p)
    _add_cluster_options(p)
    _add_attribute_option(p)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser(
        "check",
        help="check the study's attributes against hand labels (AUC, accuracy, reliability, probe)",
        description="Compare each labelled attribute's zero-shot scores with hand labels: ROC AUC "
        "with a 95% interval, accuracy at the current threshold and at the Youden-optimal one, "
        "predicted vs observed share positive in probability bins, the best single description "
        "and, with at least 20 labels of each class, a few-shot linear probe's cross-validated "
        "AUC. Fewer than 10 labels of a class give a warning instead of numbers. Tables go to "
        "the study's output folder (attribute_check*.csv).",
    )
    p.add_argument("study", type=Path, help="study file (.toml)")
    p.add_argument(
        "--labels",
        type=Path,
        required=True,
        help="CSV with columns image, attribute, label: image is an image id, a path relative "
        "to the images root, or a file path (relative to the CSV's folder); label is 1 when the "
        "attribute's positive side applies, 0 when it does not",
    )
    p.add_argument(
        "--save-threshold",
        action="store_true",
        help="save each checked attribute's Youden-optimal threshold; later runs call positives with it",
    )
    p.add_argument(
        "--save-probe",
        action="store_true",
        help="save each attribute's linear probe (needs 20 labels per class); later runs score "
        "that attribute with the probe and its own threshold instead of the prompt pair",
    )
    _add_encoder_options(p)
    _add_attribute_option(p)
    p.set_defaults(func=cmd_check)

    # --- label (explore/labelsheet.py) -----------------------------------------------
    p = sub.add_parser(
        "label",
        help="write an offline labelling sheet for a random sample of a run's images",
        description="Draw a seeded random sample of a completed run's images within brand x source "
        "(proportional to the image counts, at least 2 per stratum) and write one self-contained "
        "HTML page to label it: yes / no / can't tell per image and attribute, keyboard shortcuts, "
        "answers kept in the browser, and an export button saving the labels CSV that `explore "
        "check` and `explore run --labels` read, sample design included. Random labels give "
        "corrected shares; --boundary adds images near the decision threshold, marked as such and "
        "used for thresholds and probes only.",
    )
    p.add_argument("study", type=Path, help="study file (.toml), or its output folder")
    p.add_argument("--size", type=int, default=100, help="images in the random sample (default 100)")
    p.add_argument("--seed", type=int, default=None, help="seed of the draw (default: the study's seed); recorded in the sheet")
    p.add_argument("--boundary", type=int, default=0, metavar="N",
                   help="add N images per attribute nearest its threshold (not used for shares; default 0)")
    p.add_argument("--only", action="append", default=[], metavar="ATTRIBUTE",
                   help="label only this attribute (repeatable; default: every attribute of the run)")
    p.add_argument("--graded", action="store_true", help="also ask how strongly (1-7) per attribute")
    p.add_argument("--out", type=Path, default=None, help="the page to write (default OUTPUT/labelsheet-SHEET.html)")
    p.set_defaults(func=cmd_label)
    # --- end label ----------------------------------------------------------------------

    # --- report (explore/report/) ---------------------------------------------------
    p = sub.add_parser(
        "report",
        help="rebuild the HTML report from a study's output folder (no model needed)",
        description="Write report.html in the study's output folder from the tables a run "
        "left there: one self-contained file, photos embedded as small thumbnails, no "
        "network needed to open it.",
    )
    p.add_argument("study", type=Path, help="study file (.toml), or the output folder itself")
    p.add_argument(
        "--show-faces",
        action="store_true",
        help="do not blur detected faces in the thumbnails (the default blurs them; "
        "study key report.blur_faces)",
    )
    p.add_argument("--pdf", action="store_true",
                   help="also print the report to report.pdf with headless Chromium (/usr/bin/chromium or "
                   "EXPLORE_CHROMIUM); A4 unless --paper says otherwise")
    p.add_argument("--paper", choices=["A4", "Letter", "A4-landscape", "Letter-landscape"], default="A4",
                   help="paper size and orientation of the PDF (default A4 portrait)")
    p.set_defaults(func=cmd_report)
    # --- end report -----------------------------------------------------------------

    # --- init (explore/starter.py) ----------------------------------------------------
    p = sub.add_parser(
        "init",
        help="write a starter study file for a folder of photos FOLDER/<brand>/<source>/...",
        description="Write a study file naming the brands and sources found under FOLDER, "
        "the default attributes (Aaker's five brand-personality dimensions), encoder auto "
        "and an output folder; then run it with 'explore run STUDY'.",
    )
    p.add_argument("folder", type=Path, help="images root laid out as FOLDER/<brand>/<consumer|owned>/...")
    p.add_argument("--out", type=Path, help="study file to write (default: FOLDER/study.toml)")
    p.add_argument("--force", action="store_true", help="replace the study file if it exists")
    p.set_defaults(func=cmd_init)
    # --- end init ---------------------------------------------------------------------

    return parser


def cmd_encoders(args) -> int:
    import math

    from explore.encoders import describe_encoders
    from explore.encoders.catalogue import CATALOGUE, RESULTS_SOURCE, SPEED_SOURCE, choose_default
    from explore.encoders.clip import find_local_weights
    from explore.study import DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED

    for row in describe_encoders():
        state = "ready" if row["available"] else "not available"
        print(f"{row['name']:<10} {state:<14} {row['model']}")
        print(f"{'':<10} {row['detail']}")

    def pct(x):
        return f"{100 * x:.1f}" if math.isfinite(x) else "-"

    print("\nclip models worth running on a CPU (--encoder clip with [encoder] model / pretrained):")
    print(f"{'model':<15} {'pretrained':<22} {'IN-1k %':>7} {'38-task':>7} {'img/s':>6} {'MB':>5}  weights")
    for e in CATALOGUE:
        local = find_local_weights(e.model, e.pretrained)
        where = f"local ({local.path})" if local.path else "not local (explore fetch-model " + e.key + ")"
        mark = " *" if (e.model, e.pretrained) == (DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED) else ""
        mean = f"{e.mean_38:.3f}" if math.isfinite(e.mean_38) else "-"
        print(
            f"{e.model:<15} {e.pretrained:<22} {pct(e.imagenet_top1):>7} {mean:>7} "
            f"{e.images_per_second:>6.1f} {e.weights_mb:>5.0f}  {where}{mark}"
        )
        if e.note:
            print(f"{'':<15} {e.note}")
    _, reason = choose_default()
    print(f"* default: {reason}")
    print(f"IN-1k % and 38-task mean: zero-shot, published in {RESULTS_SOURCE}; img/s: {SPEED_SOURCE}, "
          "random weights, end to end (decode + preprocess + model), 2 cores")
    return 0


def cmd_fetch_model(args) -> int:
    import shutil

    from explore.encoders.clip import find_local_weights
    from explore.encoders.fetch import fetch_weights
    from explore.study import DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED

    model, _, pretrained = (args.model or "").partition("/")
    model = model or DEFAULT_CLIP_MODEL
    if not pretrained:
        from explore.encoders.catalogue import find

        entry = find(model, None)
        pretrained = entry.pretrained if entry else (DEFAULT_CLIP_PRETRAINED if model == DEFAULT_CLIP_MODEL else "")
    if not pretrained:
        print(f"explore: error: name the pretrained tag too: {model}/TAG (open_clip.list_pretrained())", file=sys.stderr)
        return 2
    found = find_local_weights(model, pretrained)
    if found.path is not None and found.path.is_file():
        path = found.path
        print(f"already on this machine: {path}")
    else:
        print(f"fetching {model} / {pretrained} ...")
        fetched = fetch_weights(model, pretrained, progress=None if args.quiet else sys.stderr)
        path = fetched.path
        print(f"stored and verified: {fetched.describe()}")
    real = Path(path).resolve()  # the hub cache keeps a symlink to the blob
    carry = real
    if args.to:
        args.to.mkdir(parents=True, exist_ok=True)
        carry = args.to / f"{model}-{pretrained}{Path(path).suffix}"
        shutil.copyfile(real, carry)
        print(f"copied to: {carry}")
    size = carry.stat().st_size / 1e6
    print(
        f"\nThe file to copy to an offline machine: {carry} ({size:.0f} MB)\n"
        "There, point the study at it (the model and tag keep its preprocessing):\n"
        "  [encoder]\n"
        '  name = "clip"\n'
        f'  model = "{model}"\n'
        f'  pretrained = "{pretrained}"\n'
        f'  weights = "/path/on/that/machine/{carry.name}"\n'
        f"or run with --encoder clip --weights /path/on/that/machine/{carry.name}, "
        f"or set EXPLORE_CLIP_WEIGHTS to that path (auto then takes clip)."
    )
    return 0


def cmd_embed(args) -> int:
    from explore import collect, embed
    from explore.cache import check_not_busy
    from explore.encoders import load_encoder
    from explore.output import OutputLock, Staging, write_tables
    from explore.study import DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED

    source = args.source
    if not source.exists():
        raise FileNotFoundError(f"{source}: not found (expected an images folder or a manifest .csv)")
    with OutputLock(args.out, "embed") as lock:
        for note in lock.notes:
            say(note)
        check_not_busy(args.out / "cache")  # refuse at once, not after collecting and loading a model
        cluster = _cluster_settings(args)
        staging = Staging(args.out, lock.run_id)
        try:
            folder = staging.create()
            from explore.collect_index import INDEX_NAME

            index = args.out / "cache" / INDEX_NAME  # unchanged files are not read again
            if source.suffix.lower() == ".csv":
                images = collect.collect_images(manifest=source, root=source.parent, progress=not args.quiet,
                                                index=index)
            else:
                images = collect.collect_images(root=source, progress=not args.quiet, index=index)
            say(collect.summarise(images))
            encoder, notice = load_encoder(
                args.encoder or "auto",
                model=args.model or DEFAULT_CLIP_MODEL,
                pretrained=args.pretrained or DEFAULT_CLIP_PRETRAINED,
                weights=args.weights,
                runtime=args.runtime or "torch",
            )
            if notice:
                say(notice)
            _, stats = embed.embed_table(
                images, encoder, cache_dir=args.out / "cache", batch_size=args.batch_size, progress=not args.quiet,
                cluster=cluster,
            )
            say(stats.describe())
            for note in stats.notes:
                say(f"embed: {note}")
            write_tables(folder, {"images": images, "skipped": collect.skipped_files(images)})
            staging.publish(remove_previous_tables=False)
        except BaseException:
            staging.discard()
            raise
    say(f"images table: {args.out / 'images.csv'}")
    return 0


def _run(study_path: Path, args) -> int:
    from explore.run import run_study
    from explore.study import load_study

    study = _with_extra_attributes(load_study(study_path), args.attribute)
    study.cluster = _cluster_settings(args, study.cluster)
    if args.runtime:
        study.encoder.runtime = args.runtime
    summary = run_study(
        study, encoder_name=args.encoder, weights=args.weights, labels_path=getattr(args, "labels", None),
        progress=not args.quiet, log=say,
    )
    say(f"study: {summary.study}")
    say(f"run: {summary.run_id}")
    say(f"encoder: {summary.encoder_id}")
    say(
        f"images: {summary.images_found} found, {summary.images_used} used, "
        f"{summary.images_skipped} skipped, {summary.images_embedded} embedded this run"
    )
    say("time per stage: " + ", ".join(f"{k} {v:.1f}s" for k, v in summary.stage_seconds.items()))
    if summary.notes:
        say("method notes (also in the report's Method section):")
    for note in summary.notes:
        say(note)
    say(f"outputs: {summary.output}")
    if summary.report:
        say(f"report: {summary.report}")
        _print_closing_summary(summary.output)
    return 0


def _print_closing_summary(folder) -> None:
    """The report's findings and advice: the same sentences the report opens with."""
    from explore.report import closing_summary

    for line in closing_summary(folder):
        say(line)


def cmd_run(args) -> int:
    return _run(args.study, args)


def cmd_demo(args) -> int:
    return _run(DEMO_STUDY, args)


def cmd_check(args) -> int:
    from explore.run import check_study
    from explore.study import load_study

    study = _with_extra_attributes(load_study(args.study), args.attribute)
    if args.runtime:
        study.encoder.runtime = args.runtime
    results = check_study(
        study,
        args.labels,
        encoder_name=args.encoder,
        weights=args.weights,
        save_threshold=args.save_threshold,
        save_probe=args.save_probe,
        progress=not args.quiet,
        log=say,
    )
    say(f"encoder: {results[0].encoder_id}")
    for result in results:
        say(result.describe())
    say(f"tables: {study.output / 'attribute_check.csv'} (and _reliability, _descriptions)")
    return 0


# --- init (explore/starter.py) ------------------------------------------------------
def cmd_init(args) -> int:
    from explore.starter import find_brands, write_starter_study

    path = write_starter_study(args.folder, args.out, force=args.force)
    brands = {b: s for b, s in find_brands(args.folder).items() if s}
    say(f"study: {path}")
    say(f"brands: {len(brands)} ({', '.join(brands)})")
    say(f"next: explore run {path}")
    return 0
# --- end init -----------------------------------------------------------------------


# --- label (explore/labelsheet.py) ---------------------------------------------------
def cmd_label(args) -> int:
    import json

    from explore.labelsheet import write_sheet
    from explore.study import load_study

    if args.study.is_dir():
        folder = args.study
        run = folder / "run.json"
        seed = json.loads(run.read_text(encoding="utf-8")).get("settings", {}).get("seed", 0) if run.is_file() else 0
    else:
        study = load_study(args.study)
        folder, seed = study.output, study.seed
    seed = args.seed if args.seed is not None else seed
    tmp = folder / "labelsheet.html.tmp"
    path, facts = write_sheet(folder, args.out or tmp, size=args.size, seed=seed, attributes=args.only or None,
                              boundary=args.boundary, graded=args.graded, progress=not args.quiet)
    if args.out is None:
        path = path.replace(folder / f"labelsheet-{facts['sheet']}.html")
    print(f"sheet {facts['sheet']}: {facts['random']} images drawn at random within {facts['strata']} brand x "
          f"source strata (seed {seed})" + (f", {facts['boundary']} near the decision boundary" if facts["boundary"] else "")
          + f"; attributes: {', '.join(facts['attributes'])}")
    print(f"labelling sheet: {path}")
    print("open it in a browser, label, press 'Export labels CSV', then: explore run STUDY --labels FILE.csv")
    return 0
# --- end label -----------------------------------------------------------------------


# --- report (explore/report/) -------------------------------------------------------
def cmd_report(args) -> int:
    from explore.output import OutputLock, check_one_run
    from explore.report import REPORT_NAME, ReportError, write_report
    from explore.study import check_report_settings, load_study

    study = None
    if args.study.is_dir():
        folder = args.study
    else:
        study = load_study(args.study)
        check_report_settings(study.report, str(args.study))
        folder = study.output
    if not Path(folder).is_dir():
        say(f"explore: error: {folder}: output folder not found; run the study first (explore run STUDY)",
              file=sys.stderr)
        return 2
    try:
        with OutputLock(folder, "report") as lock:
            for note in lock.notes:
                say(note)
            check_one_run(folder)  # never a report from tables of different runs
            try:
                blur = False if getattr(args, "show_faces", False) else None
                path = write_report(folder, study, blur_faces=blur)
            except BaseException:
                (Path(folder) / f"{REPORT_NAME}.tmp").unlink(missing_ok=True)
                raise
    except ReportError as exc:
        say(f"explore: error: {exc}", file=sys.stderr)
        return 2
    say(f"report: {path}")
    _print_closing_summary(path.parent)
    if args.pdf:
        from explore.report import write_pdf

        try:
            pdf = write_pdf(path, paper=args.paper)
        except ReportError as exc:
            say(f"explore: error: {exc}", file=sys.stderr)
            return 2
        say(f"pdf: {pdf}")
    return 0
# --- end report -----------------------------------------------------------------------


def os_error_line(exc: OSError) -> str:
    """``PATH: reason`` for an OSError (our own FileNotFoundError messages already name the path)."""
    if exc.filename is None:
        return " ".join(str(exc).split())
    where = str(exc.filename)
    if exc.filename2 is not None:
        where += f" -> {exc.filename2}"
    reason = exc.strerror or str(exc)
    if exc.errno == errno.ENOSPC:
        reason += "; free some space (the previous results are unchanged)"
    elif exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        reason += "; choose a folder you can write to"
    return f"{where}: {reason}"


def main(argv: list[str] | None = None) -> int:
    from explore.cache import CacheError  # includes CacheBusy (another run holds the cache)
    from explore.embed import EmbedError
    from explore.encoders.base import EncoderUnavailable
    from explore.output import OutputError  # includes OutputBusy (another command holds the folder)
    from explore.study import StudyError

    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 0
    try:
        return args.func(args)
    except (StudyError, EncoderUnavailable, CacheError, EmbedError, OutputError) as exc:
        say(f"explore: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # the environment: permissions, read-only or full disk, a file in the way
        say(f"explore: error: {os_error_line(exc)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        say("explore: interrupted; what was cached so far is kept", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
