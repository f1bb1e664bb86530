"""Command line: parse arguments, call the stages, print progress. Kept thin.

Heavy libraries (torch, open_clip, umap, hdbscan, bokeh) are imported only by
the commands that need them, so ``explore --help`` answers at once.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from explore import __version__

DEMO_STUDY = Path(__file__).resolve().parent.parent / "demo_images" / "study.toml"


def _add_encoder_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--encoder",
        choices=["auto", "bundled", "clip"],
        help="encoder family (default: the study's, else auto = clip when its weights are "
        "present locally, otherwise bundled)",
    )
    p.add_argument("--weights", type=Path, help="local open_clip checkpoint file for --encoder clip")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="explore",
        description="How brands are portrayed in photos: zero-shot attributes, usage "
        "contexts, consumer vs owned comparisons, and a self-contained HTML report.",
    )
    parser.add_argument("--version", action="version", version=f"explore {__version__}")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("encoders", help="list encoder families and whether each can run here")
    p.set_defaults(func=cmd_encoders)

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
    p.set_defaults(func=cmd_embed)

    p = sub.add_parser("run", help="run a study end to end (every stage, reusing the cache)")
    p.add_argument("study", type=Path, help="study file (.toml)")
    _add_encoder_options(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("demo", help="run the shipped demo study (fictional brands) end to end")
    _add_encoder_options(p)
    p.set_defaults(func=cmd_demo)

    # --- report (explore/report/) ---------------------------------------------------
    p = sub.add_parser(
        "report",
        help="rebuild the HTML report from a study's output folder (no model needed)",
        description="Write report.html in the study's output folder from the tables a run "
        "left there: one self-contained file, photos embedded as small thumbnails, no "
        "network needed to open it.",
    )
    p.add_argument("study", type=Path, help="study file (.toml), or the output folder itself")
    p.set_defaults(func=cmd_report)
    # --- end report -----------------------------------------------------------------

    return parser


def cmd_encoders(args) -> int:
    from explore.encoders import describe_encoders

    for row in describe_encoders():
        state = "ready" if row["available"] else "not available"
        print(f"{row['name']:<10} {state:<14} {row['model']}")
        print(f"{'':<10} {row['detail']}")
    return 0


def cmd_embed(args) -> int:
    from explore import collect, embed
    from explore.encoders import load_encoder
    from explore.run import write_tables
    from explore.study import DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED

    source = args.source
    if source.suffix.lower() == ".csv":
        images = collect.collect_images(manifest=source, root=source.parent, progress=not args.quiet)
    else:
        images = collect.collect_images(root=source, progress=not args.quiet)
    print(collect.summarise(images))
    encoder, notice = load_encoder(
        args.encoder or "auto",
        model=args.model or DEFAULT_CLIP_MODEL,
        pretrained=args.pretrained or DEFAULT_CLIP_PRETRAINED,
        weights=args.weights,
    )
    if notice:
        print(notice)
    _, stats = embed.embed_table(
        images, encoder, cache_dir=args.out / "cache", batch_size=args.batch_size, progress=not args.quiet
    )
    print(stats.describe())
    write_tables(args.out, {"images": images, "skipped": collect.skipped_files(images)})
    print(f"images table: {args.out / 'images.csv'}")
    return 0


def _run(study_path: Path, args) -> int:
    from explore.run import run_study
    from explore.study import load_study

    study = load_study(study_path)
    summary = run_study(study, encoder_name=args.encoder, weights=args.weights, progress=not args.quiet)
    print(f"study: {summary.study}")
    print(f"encoder: {summary.encoder_id}")
    print(
        f"images: {summary.images_found} found, {summary.images_used} used, "
        f"{summary.images_skipped} skipped, {summary.images_embedded} embedded this run"
    )
    print("time per stage: " + ", ".join(f"{k} {v:.1f}s" for k, v in summary.stage_seconds.items()))
    for note in summary.notes:
        print(note)
    print(f"outputs: {summary.output}")
    if summary.report:
        print(f"report: {summary.report}")
    return 0


def cmd_run(args) -> int:
    return _run(args.study, args)


def cmd_demo(args) -> int:
    return _run(DEMO_STUDY, args)


# --- report (explore/report/) -------------------------------------------------------
def cmd_report(args) -> int:
    from explore.report import ReportError, write_report
    from explore.study import load_study

    try:
        if args.study.is_dir():
            path = write_report(args.study)
        else:
            study = load_study(args.study)
            path = write_report(study.output, study)
    except ReportError as exc:
        print(f"explore: error: {exc}", file=sys.stderr)
        return 2
    print(f"report: {path}")
    return 0
# --- end report -----------------------------------------------------------------------


def main(argv: list[str] | None = None) -> int:
    from explore.cache import CacheError  # includes CacheBusy (another run holds the cache)
    from explore.embed import EmbedError
    from explore.encoders.base import EncoderUnavailable
    from explore.study import StudyError

    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 0
    try:
        return args.func(args)
    except (StudyError, EncoderUnavailable, FileNotFoundError, CacheError, EmbedError) as exc:
        print(f"explore: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("explore: interrupted; what was cached so far is kept", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
