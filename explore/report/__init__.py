"""The report: one self-contained HTML file built from a study's output folder.

``write_report(folder)`` reads only the output folder (tables and run.json)
and the image files named in its images table (for thumbnails), and writes
``report.html`` next to the tables. No model is needed, so
``explore report STUDY`` can rebuild it at any time.

Sections: overview, brand view, context map, contexts, brand x context,
attributes, comparisons. Each section appears only when its tables exist and
says so when they do not. See :mod:`explore.report.page` for the escaping
rules.
"""

from __future__ import annotations

from pathlib import Path

from explore.report.data import ReportError, load_output

__all__ = ["write_report", "closing_summary", "write_pdf", "ReportError", "REPORT_NAME"]

REPORT_NAME = "report.html"
FINDINGS_NAME = "findings"


def write_report(output_folder: str | Path, study=None, blur_faces: bool | None = None) -> Path:
    """Build ``report.html`` in ``output_folder``.

    Parameters
    ----------
    output_folder : the study's output folder (tables as NAME.parquet, run.json).
    study : optional ``Study``; its ``report`` settings (thumbnail_px,
        max_thumbnails, blur_faces) and ``seed`` are used. Without it they are
        read from run.json's recorded settings, else defaults.
    blur_faces : when given, overrides the setting (``explore report --show-faces``).

    Returns
    -------
    Path of the written report.

    Raises
    ------
    ReportError when the folder is not a study output folder or a setting is invalid.
    """
    from explore.report.page import build_page
    from explore.study import ReportSettings

    folder = Path(output_folder).resolve()
    out = load_output(folder)
    defaults = ReportSettings()
    recorded = (out.run.get("settings") or {}) if out.run else {}
    if study is not None:
        px, cap, seed = study.report.thumbnail_px, study.report.max_thumbnails, study.seed
        blur = study.report.blur_faces
    else:
        rep = recorded.get("report") or {}
        px = int(rep.get("thumbnail_px", defaults.thumbnail_px))
        cap = int(rep.get("max_thumbnails", defaults.max_thumbnails))
        seed = int(recorded.get("seed", 0) or 0)
        blur = bool(rep.get("blur_faces", defaults.blur_faces))
    if blur_faces is not None:
        blur = bool(blur_faces)
    if not 16 <= px <= 512:
        raise ReportError(f"report.thumbnail_px is {px}; expected a size between 16 and 512 pixels")
    if cap < 0:
        raise ReportError(f"report.max_thumbnails is {cap}; expected 0 or more")
    from explore.report.findings import findings_table

    from explore.output import write_tables

    findings = findings_table(out.tables)
    # as every table: atomic, formula-guarded CSV, stamped with the run the folder holds
    write_tables(folder, {FINDINGS_NAME: findings}, run_id=(out.run or {}).get("run_id") or None)
    out.tables[FINDINGS_NAME] = findings
    html = build_page(out, thumbnail_px=px, max_thumbnails=cap, seed=seed, cache_dir=folder / "cache",
                      blur_faces=blur)
    target = folder / REPORT_NAME
    tmp = target.with_suffix(".html.tmp")
    try:
        tmp.write_text(html, encoding="utf-8")
        tmp.replace(target)
    finally:
        tmp.unlink(missing_ok=True)
    return target


def closing_summary(output_folder: str | Path) -> list[str]:
    """The lines the commands print last: the report's findings, then its advice (same sentences).

    Reads ``findings.parquet`` (written by ``write_report``) and the tables of the folder.
    """
    import pandas as pd

    from explore.report.advice import advice_lines
    from explore.report.findings import findings_basis, summary_lines

    folder = Path(output_folder)
    out = load_output(folder)
    path = folder / f"{FINDINGS_NAME}.parquet"
    findings = pd.read_parquet(path) if path.is_file() else None
    lines = ["findings (only results that pass the study's tests; numbers and counts in findings.csv):"]
    lines += ["  " + line for line in summary_lines(findings)]
    lines += ["  " + line for line in findings_basis(out.tables)[1:]]
    advice = advice_lines(out.tables, out.run, findings)
    if advice:
        lines.append("advice:")
        lines += [f"  - {a}" for a in advice]
    return lines


#: CSS page sizes for ``write_pdf``.
PAPER = {"A4": "A4 portrait", "Letter": "letter portrait", "A4-landscape": "A4 landscape",
         "Letter-landscape": "letter landscape"}


def find_chromium() -> Path | None:
    """Headless Chromium: ``EXPLORE_CHROMIUM`` if set, else /usr/bin/chromium or one on PATH."""
    import os
    import shutil

    named = os.environ.get("EXPLORE_CHROMIUM")
    if named:
        return Path(named) if Path(named).is_file() else None
    for candidate in ("/usr/bin/chromium", "chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(candidate)
        if found:
            return Path(found)
    return None


def write_pdf(report: str | Path, paper: str = "A4", timeout: float = 300.0) -> Path:
    """Print ``report.html`` to ``report.pdf`` beside it with headless Chromium.

    The page's print stylesheet applies (navigation hidden, one section per
    page, charts as pictures scaled to the paper). Chromium's own flags set no
    paper size, so a copy of the page with an ``@page`` size rule is printed
    (written beside the report, removed afterwards). Nothing is fetched: the
    page is self-contained and Chromium runs with networking features off.

    Raises
    ------
    ReportError when no Chromium is found (saying how to install one), the
    paper is unknown, or Chromium fails.
    """
    import subprocess

    report = Path(report).resolve()
    if paper not in PAPER:
        raise ReportError(f"paper {paper!r} is not one of {', '.join(PAPER)}")
    chromium = find_chromium()
    if chromium is None:
        raise ReportError(
            "no PDF written: headless Chromium was not found (looked for EXPLORE_CHROMIUM, /usr/bin/chromium, "
            "chromium on PATH). Install it (Debian/Ubuntu: apt-get install -y chromium) or open the report in a "
            "browser and print it to PDF; the print layout is the same."
        )
    html = report.read_text(encoding="utf-8")
    rule = f"<style>@page {{ size: {PAPER[paper]}; margin: 12mm; }}</style>"
    html = html.replace("</head>", rule + "</head>", 1)
    staged = report.with_name(f".{report.stem}.print.html")
    target = report.with_suffix(".pdf")
    staged.write_text(html, encoding="utf-8")
    try:
        proc = subprocess.run(
            [str(chromium), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--no-pdf-header-footer", "--virtual-time-budget=30000",
             f"--print-to-pdf={target}", staged.as_uri()],
            capture_output=True, text=True, timeout=timeout,
        )
    except (OSError, subprocess.TimeoutExpired) as exc:
        raise ReportError(f"{chromium}: could not print the report to PDF ({exc})") from exc
    finally:
        staged.unlink(missing_ok=True)
    if proc.returncode != 0 or not target.is_file() or target.stat().st_size == 0:
        raise ReportError(f"{chromium} exited {proc.returncode} without writing {target}: {proc.stderr.strip()[-500:]}")
    return target
