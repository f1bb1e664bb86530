"""Report findings and contexts sections: section data from the findings and context tables."""

from __future__ import annotations

import math

import pandas as pd

from explore.report import colours
from explore.report.advice import advice_lines
from explore.report.data import OutputFolder
from explore.report.findings import findings_basis
from explore.report.format import MAX_HTML_ROWS, _clean, fmt_number, html_table
from explore.report.overview import _tests_sentences
from explore.report.tables import cell as table_cell
from explore.report.tables import label as column_label


def _findings_section(out: OutputFolder, findings: pd.DataFrame, brands: list[str], brand_category: dict,
                      attribute_names: list[str]) -> dict:
    """Per brand: its findings with their evidence links, then what they rest on and the advice."""
    anchors = {a: f"attr-{k}" for k, a in enumerate(attribute_names)}
    blocks = []
    for brand in brands:
        rows = findings[findings["brand"].astype(str) == brand].sort_values("rank") if len(findings) else findings
        items = []
        for rec in rows.to_dict("records"):
            evidence = str(rec.get("evidence") or "")
            item = {"rank": int(rec["rank"]), "kind": str(rec["kind"]), "sentence": str(rec["sentence"]),
                    "value": _clean(rec.get("value")), "test": str(rec.get("test") or ""),
                    "estimand": str(rec.get("estimand") or ""), "context_id": None, "source": "all", "anchor": ""}
            if evidence.startswith("photos:"):
                item["context_id"] = _clean(rec.get("context_id"))
                src = str(rec.get("source") or "all")
                item["source"] = src if src in ("consumer", "owned") else "all"
                item["anchor"] = f"context-{int(rec['context_id'])}"
            elif evidence.startswith("chart:"):
                item["anchor"] = anchors.get(str(rec.get("attribute")), "attributes")
            items.append(item)
        blocks.append({"brand": brand, "category": str(brand_category.get(brand, "")), "findings": items})
    return {
        "blocks": blocks,
        "basis": findings_basis(out.tables),
        "advice": advice_lines(out.tables, out.run, findings),
        "total": len(findings),
    }


def _contexts_section(out: OutputFolder, context_list: list[dict], bc_all, brands: list[str]) -> dict:
    cards = []
    for c in context_list:
        indices = []
        if bc_all is not None:
            rows = bc_all[bc_all["context_id"] == c["id"]]
            for rec in rows.sort_values("index", ascending=False).to_dict("records"):
                idx = _clean(rec.get("index"))
                indices.append({
                    "brand": rec["brand"],
                    "index": "–" if idx is None else f"{idx:.0f}",
                    "count": fmt_number(rec.get("count")),
                    "colour": colours.diverging_index(idx if idx is not None else float("nan")),
                    "dark": idx is not None and idx > 0 and abs(math.log2(idx / 100)) > 1.2,
                })
        cards.append({**c, "indices": indices})
    lists = []
    tested = _tests_sentences(out)
    for key, title in (("signature_contexts", "Signature contexts"), ("unexpected_contexts", "Unexpected contexts")):
        table = out.get(key)
        if table is None or not len(table):
            missing = out.missing(key)
            if table is not None and not len(table):
                missing = tested[key]
            lists.append({"key": key, "title": title, "missing": missing, "rows": []})
            continue
        preferred = ["brand", "source", "context", "count", "brand_n", "share", "category_share",
                     "index", "q_value", "reason"]
        cols = [c for c in preferred if c in table.columns]
        if "source" in cols and set(table["source"].astype(str)) <= {"all"}:
            cols.remove("source")
        rows = []
        sort_cols = [c for c in ("brand", "index") if c in table.columns]
        t = table.sort_values(sort_cols, ascending=[True, False][: len(sort_cols)]) if sort_cols else table
        for rec in t.head(MAX_HTML_ROWS).to_dict("records"):
            rows.append({
                "cells": [table_cell(col, rec.get(col), rec.get("brand_n")) for col in cols],
                "brand": str(rec.get("brand", "")),
                "context_id": int(rec["context_id"]) if "context_id" in rec and pd.notna(rec["context_id"]) else None,
                "context": str(rec.get("context", "")),
                "source": str(rec.get("source", "all") or "all"),
            })
        lists.append({"key": key, "title": title, "missing": "", "columns": [column_label(c) for c in cols],
                      "rows": rows, "total": len(table)})
    gaps = out.get("source_context_gaps")
    return {
        "cards": cards,
        "lists": lists,
        "missing": "" if context_list else out.missing("contexts", "context_id", "context"),
        "source_gaps": html_table(gaps) if out.has("source_context_gaps") else None,
        "source_gaps_empty": tested["source_context_gaps"] if gaps is not None and not len(gaps) else "",
    }
