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

__all__ = ["write_report", "ReportError", "REPORT_NAME"]

REPORT_NAME = "report.html"


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
    html = build_page(
        out, thumbnail_px=px, max_thumbnails=cap, seed=seed, cache_dir=folder / "cache", blur_faces=blur
    )
    target = folder / REPORT_NAME
    tmp = target.with_suffix(".html.tmp")
    tmp.write_text(html, encoding="utf-8")
    tmp.replace(target)
    return target
