"""Plain-language findings: what a manager reads first, built only from results that pass the study's tests.

``findings_table(tables)`` is a pure function of the output tables (the same
ones written as CSV), so every finding can be reproduced from the CSV files:
each row carries the counts it was computed from, its number, its 95 %
interval, the test it passed and the table and row it came from. The report
shows the sentences first; ``explore run``/``demo``/``report`` print the same
sentences as their closing summary (``summary_lines``).

What counts as a finding (nothing else is promoted):

- signature context: a row of ``signature_contexts`` (Fisher exact test,
  Benjamini-Hochberg q at most the study's ``fdr``, index and count above the
  study's minimums). Number: the brand's share of photos in the context with a
  95 % Wilson score interval (Wilson, 1927) from ``count`` / ``brand_n``.
  Marked "unexpected" when the same row is in ``unexpected_contexts``.
- consumer vs owned context gap: a row of ``source_context_gaps`` with
  ``significant`` true (BH over the tested rows). Number: consumer minus owned
  share with a 95 % Newcombe hybrid score interval (Newcombe, 1998, method 10).
- attribute gap: a row of ``attribute_gaps`` that passes a multiple-testing
  correction, i.e. a ``q_value`` column at most ``fdr`` and, where the table
  has it, ``significant`` (the study's decision after BH and the context
  adjustment); the context-adjusted gap is quoted beside it when present. Without q-values (older
  runs) no attribute gap is promoted, and ``findings_basis`` says so. The
  number is the corrected prevalence gap when the run has hand-label corrected
  shares for that attribute, else the gap in the model's yes-rate, and the
  sentence names which one it is.
"""

from __future__ import annotations


import numpy as np
import pandas as pd

#: Most findings per brand (the issue asks for 3-7; fewer when fewer results pass).
MAX_PER_BRAND = 7
#: Default false discovery rate when the run did not record the study's.
DEFAULT_FDR = 0.05

COLUMNS = [
    "brand", "category", "rank", "kind", "sentence", "value", "value_low", "value_high", "unit", "estimand",
    "interval", "test", "q_value", "index", "source", "context_id", "context", "attribute",
    "count", "n", "other_count", "other_n", "from_table", "evidence",
]


def study_fdr(tables: dict[str, pd.DataFrame]) -> float:
    """The study's false discovery rate as recorded in the contexts table (else 0.05)."""
    ctx = tables.get("contexts")
    if ctx is not None and "setting_fdr" in ctx and len(ctx):
        v = pd.to_numeric(ctx["setting_fdr"], errors="coerce").dropna()
        if len(v):
            return float(v.iloc[0])
    return DEFAULT_FDR


def wilson(count: float, n: float) -> tuple[float, float]:
    """95 % Wilson score interval of count / n (statsmodels' ``proportion_confint``)."""
    from statsmodels.stats.proportion import proportion_confint

    if not n or n <= 0:
        return float("nan"), float("nan")
    lo, hi = proportion_confint(int(count), int(n), alpha=0.05, method="wilson")
    return float(lo), float(hi)


def newcombe(count_a: float, n_a: float, count_b: float, n_b: float) -> tuple[float, float]:
    """95 % Newcombe hybrid score interval of count_a/n_a - count_b/n_b (statsmodels)."""
    from statsmodels.stats.proportion import confint_proportions_2indep

    if not n_a or not n_b:
        return float("nan"), float("nan")
    lo, hi = confint_proportions_2indep(int(count_a), int(n_a), int(count_b), int(n_b), method="newcomb", compare="diff")
    return float(lo), float(hi)


# --------------------------------------------------------------------------
# Number wording (shared with the page so the sentence and the table agree)


def pct_digits(n) -> int:
    """Decimals a share supports: whole percent below 1,000 photos, one decimal above."""
    try:
        return 1 if float(n) >= 1000 else 0
    except (TypeError, ValueError):
        return 0


def pct(v, digits: int = 0) -> str:
    """0.234 -> '23 %' (NaN -> '–')."""
    if v is None or not np.isfinite(v):
        return "–"
    return f"{100 * v:.{digits}f} %"


def points(v, digits: int = 0) -> str:
    """0.234 -> '+23' percentage points, with the sign; U+2212 for minus."""
    if v is None or not np.isfinite(v):
        return "–"
    text = f"{100 * v:+.{digits}f}"
    return text.replace("-", "\u2212")


def p_text(q) -> str:
    """A p- or q-value as text: '< 0.001' below 0.001, else three decimals."""
    if q is None or not np.isfinite(q):
        return "–"
    return "< 0.001" if q < 0.001 else f"{q:.3f}"


def _f(v) -> float:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return v


def _q(name) -> str:
    return f"“{name}”"


def _weak_names(tables) -> dict[int, str]:
    """Context id -> its candidate phrases, for contexts whose zero-shot name is weak."""
    cx = tables.get("contexts")
    if cx is None or not len(cx) or not {"name_source", "candidates"} <= set(cx.columns):
        return {}
    weak = cx[cx["name_source"] == "zero-shot, weak"]
    return {int(r.context_id): str(r.candidates) for r in weak.itertuples()}


def _context_text(rec, weak: dict[int, str]) -> str:
    """The quoted context name; a weak one says it is unnamed and lists the model's candidates."""
    cid = int(rec["context_id"])
    text = _q(rec.get("context", cid))
    if cid in weak and weak[cid]:
        text += f" (no confident name; the model's candidates: {weak[cid].replace(' | ', ', ')})"
    return text


# --------------------------------------------------------------------------
# Candidates per kind


def _context_findings(tables, fdr: float) -> list[dict]:
    sig = tables.get("signature_contexts")
    if sig is None or not len(sig) or not {"brand", "context_id", "count", "brand_n"} <= set(sig.columns):
        return []
    unexpected = {}
    un = tables.get("unexpected_contexts")
    if un is not None and len(un) and {"brand", "context_id"} <= set(un.columns):
        for rec in un.to_dict("records"):
            unexpected[(str(rec["brand"]), str(rec.get("source", "all")), int(rec["context_id"]))] = rec
    out = []
    weak = _weak_names(tables)
    for rec in sig.to_dict("records"):
        brand, source = str(rec["brand"]), str(rec.get("source", "all") or "all")
        cid, count, n = int(rec["context_id"]), _f(rec["count"]), _f(rec["brand_n"])
        share = count / n if n else float("nan")
        lo, hi = wilson(count, n)
        rest_n, rest_count = _f(rec.get("rest_n")), _f(rec.get("rest_count"))
        rest_share = rest_count / rest_n if rest_n else _f(rec.get("rest_share"))
        d = pct_digits(n)
        whose = f"{brand}'s {source} photos" if source != "all" else f"{brand}'s photos"
        category = str(rec.get("category", "") or "")
        others = f"the other {category} brands" if category and category != "all" else "the other brands"
        index = _f(rec.get("index"))
        q = _f(rec.get("q_value"))
        text = (
            f"{pct(share, d)} of {whose} show {_context_text(rec, weak)} (95 % CI {pct(lo, d)} to {pct(hi, d)}), "
            f"against {pct(rest_share, d)} for {others}: index {index:.0f} (100 = as often as the category)."
        )
        key = (brand, source, cid)
        kind = "signature context"
        if key in unexpected:
            kind = "unexpected context"
            reason = str(unexpected[key].get("reason", "") or "").strip()
            text += f" Unexpected for the category{': ' + reason.rstrip('.') if reason else ''}."
        out.append(dict(
            brand=brand, category=category, kind=kind, sentence=text, value=share, value_low=lo, value_high=hi,
            unit="share of photos", estimand=f"share of {whose} in the context (assigned by clustering)",
            interval="95 % Wilson score", test=f"Fisher exact vs the rest of the category, BH q {p_text(q)} (at most {fdr:g})",
            q_value=q, index=index, source=source, context_id=cid, context=str(rec.get("context", "")),
            attribute="", count=count, n=n, other_count=rest_count, other_n=rest_n,
            from_table="signature_contexts", evidence=f"photos:context={cid}",
            _strength=index if np.isfinite(index) else 0.0, _group=0 if source == "all" else 1,
        ))
    return out


def _source_gap_findings(tables, fdr: float) -> list[dict]:
    t = tables.get("source_context_gaps")
    need = {"brand", "context_id", "consumer_count", "consumer_n", "owned_count", "owned_n", "significant"}
    if t is None or not len(t) or not need <= set(t.columns):
        return []
    out = []
    weak = _weak_names(tables)
    for rec in t[t["significant"].fillna(False).astype(bool)].to_dict("records"):
        cid = int(rec["context_id"])
        if cid < 0:
            continue
        brand = str(rec["brand"])
        cc, cn, oc, on = (_f(rec[c]) for c in ("consumer_count", "consumer_n", "owned_count", "owned_n"))
        cs, os_ = cc / cn, oc / on
        gap = cs - os_
        lo, hi = newcombe(cc, cn, oc, on)
        d = pct_digits(min(cn, on))
        more, less = ("consumer", "owned") if gap > 0 else ("owned", "consumer")
        q = _f(rec.get("q_value"))
        text = (
            f"{_context_text(rec, weak)} is more common in {brand}'s {more} photos than in its {less} photos: "
            f"consumer {pct(cs, d)}, owned {pct(os_, d)} (difference {points(gap, d)} points, "
            f"95 % CI {points(lo, d)} to {points(hi, d)})."
        )
        out.append(dict(
            brand=brand, category=str(rec.get("category", "") or ""), kind="consumer vs owned context",
            sentence=text, value=gap, value_low=lo, value_high=hi, unit="percentage points (share difference)",
            estimand="consumer minus owned share of the brand's photos in the context",
            interval="95 % Newcombe hybrid score", test=f"Fisher exact consumer vs owned, BH q {p_text(q)} (at most {fdr:g})",
            q_value=q, index=float("nan"), source="consumer − owned", context_id=cid, context=str(rec.get("context", "")),
            attribute="", count=cc, n=cn, other_count=oc, other_n=on, from_table="source_context_gaps",
            evidence=f"photos:context={cid}", _strength=abs(gap), _group=0,
        ))
    return out


def _attribute_findings(tables, fdr: float) -> tuple[list[dict], str]:
    gaps = tables.get("attribute_gaps")
    if gaps is None or not len(gaps) or not {"brand", "attribute"} <= set(gaps.columns):
        return [], "no attribute gaps in this run"
    qcol = next((c for c in ("q_value", "gap_q_value", "yes_rate_gap_q") if c in gaps.columns), None)
    if qcol is None:
        return [], ("attribute gaps are not listed as findings: this run's attribute_gaps table has no "
                    "multiple-testing corrected q-values, only uncorrected intervals")
    new_names = "yes_rate_gap" in gaps.columns
    out = []
    used_corrected = used_yes_rate = 0
    for rec in gaps.to_dict("records"):
        q = _f(rec.get(qcol))
        if not (np.isfinite(q) and q <= fdr):
            continue
        # The study's own decision where it makes one (after BH and, once contexts exist, the
        # context adjustment: attributes.adjust_gaps_for_context).
        if "significant" in rec and not bool(rec.get("significant")):
            continue
        corrected = new_names and np.isfinite(_f(rec.get("gap"))) and np.isfinite(_f(rec.get("gap_low")))
        if corrected:
            cs, os_, gap, lo, hi = (_f(rec.get(c)) for c in ("consumer_share", "owned_share", "gap", "gap_low", "gap_high"))
            what = "corrected share (from hand labels)"
            used_corrected += 1
        elif new_names:
            cs, os_, gap, lo, hi = (_f(rec.get(c)) for c in ("consumer_yes_rate", "owned_yes_rate", "yes_rate_gap",
                                                            "yes_rate_gap_low", "yes_rate_gap_high"))
            what = "model's yes-rate"
            used_yes_rate += 1
        else:  # before the yes-rate rename the uncorrected numbers were called share
            cs, os_, gap, lo, hi = (_f(rec.get(c)) for c in ("consumer_share", "owned_share", "gap", "gap_low", "gap_high"))
            what = "model's yes-rate"
            used_yes_rate += 1
        if not (np.isfinite(gap) and np.isfinite(lo) and np.isfinite(hi)) or (lo <= 0 <= hi):
            continue
        brand, attribute = str(rec["brand"]), str(rec["attribute"])
        cn, on = _f(rec.get("consumer_n")), _f(rec.get("owned_n"))
        d = pct_digits(min(cn, on) if np.isfinite(cn) and np.isfinite(on) else 0)
        more, less = ("consumer", "owned") if gap > 0 else ("owned", "consumer")
        text = (
            f"The {what} for {_q(attribute)} is {abs(100 * gap):.{d}f} points higher in {brand}'s {more} photos than in "
            f"its {less} photos: consumer {pct(cs, d)}, owned {pct(os_, d)} "
            f"(95 % CI of the difference {points(lo, d)} to {points(hi, d)} points)."
        )
        adj, alo, ahi = (_f(rec.get(c)) for c in ("context_adjusted_gap", "context_adjusted_low", "context_adjusted_high"))
        if np.isfinite(adj):
            text += (f" Within the same contexts the gap is {points(adj, d)} points "
                     f"(95 % CI {points(alo, d)} to {points(ahi, d)}).")
        sg, sglo, sghi = (_f(rec.get(c)) for c in ("share_gap", "share_gap_low", "share_gap_high"))
        if what == "model's yes-rate" and np.isfinite(sg):
            text += (f" Corrected with the random hand labels, the gap in the share of photos showing it is "
                     f"{points(sg, d)} points (95 % CI {points(sglo, d)} to {points(sghi, d)}).")
        q_ctx = _f(rec.get("context_q_value"))
        out.append(dict(
            brand=brand, category=str(rec.get("category", "") or ""), kind="attribute gap", sentence=text,
            value=gap, value_low=lo, value_high=hi, unit="percentage points (consumer − owned)",
            estimand=f"consumer minus owned {what}", interval="95 % as in attribute_gaps",
            test=f"consumer vs owned, BH q {p_text(q)} (at most {fdr:g})"
                 + (f"; context-adjusted (Cochran-Mantel-Haenszel) BH q {p_text(q_ctx)}" if np.isfinite(q_ctx) else ""),
            q_value=q, index=float("nan"),
            source="consumer − owned", context_id=float("nan"), context="", attribute=attribute,
            count=float("nan"), n=cn, other_count=float("nan"), other_n=on, from_table="attribute_gaps",
            evidence=f"chart:attribute={attribute}", _strength=abs(gap), _group=0,
        ))
    if not out:
        tested = int(gaps[qcol].notna().sum())
        after = " and the context adjustment" if "context_q_value" in gaps.columns else ""
        return [], (f"no consumer vs owned gap of the model's yes-rate passed Benjamini-Hochberg{after} "
                    f"({tested} gaps tested)")
    basis = "attribute gaps after BH correction"
    if used_corrected and used_yes_rate:
        basis += " (corrected shares where hand labels exist, the model's yes-rate elsewhere)"
    elif used_corrected:
        basis += " (corrected shares from hand labels)"
    else:
        basis += " (the model's yes-rate: no hand-label corrected shares)"
    return out, basis


def findings_table(tables: dict[str, pd.DataFrame], max_per_brand: int = MAX_PER_BRAND) -> pd.DataFrame:
    """Findings per brand from the output tables (pure: same tables, same findings).

    Parameters
    ----------
    tables : output tables by name (``signature_contexts``, ``unexpected_contexts``,
        ``source_context_gaps``, ``attribute_gaps``, ``contexts``; any may be missing).
    max_per_brand : most findings kept per brand.

    Returns
    -------
    DataFrame with ``COLUMNS``: per brand, ranked 1..k. The kinds take turns
    (contexts, attribute gaps, consumer vs owned contexts), strongest first
    within a kind, so one kind does not crowd out the others.
    """
    fdr = study_fdr(tables)
    attr, _ = _attribute_findings(tables, fdr)
    kinds = [_context_findings(tables, fdr), attr, _source_gap_findings(tables, fdr)]
    by_brand: dict[str, list[list[dict]]] = {}
    for k, items in enumerate(kinds):
        for it in items:
            by_brand.setdefault(it["brand"], [[] for _ in kinds])[k].append(it)
    rows = []
    for brand in sorted(by_brand):
        queues = [sorted(q, key=lambda r: (r["_group"], -r["_strength"])) for q in by_brand[brand]]
        # A context shown for all photos is not repeated for one source.
        seen_ctx = set()
        picked = []
        while len(picked) < max_per_brand and any(queues):
            for q in queues:
                while q:
                    it = q.pop(0)
                    key = (it["kind"] in ("signature context", "unexpected context"), it["context_id"])
                    if key[0] and key in seen_ctx:
                        continue
                    seen_ctx.add(key)
                    picked.append(it)
                    break
                if len(picked) >= max_per_brand:
                    break
        for rank, it in enumerate(picked, 1):
            rows.append({**{c: it.get(c) for c in COLUMNS}, "rank": rank})
    return pd.DataFrame(rows, columns=COLUMNS)


def findings_basis(tables: dict[str, pd.DataFrame]) -> list[str]:
    """Sentences saying what the findings were drawn from (and what was left out, and why)."""
    fdr = study_fdr(tables)
    out = [f"Findings list only results that pass the study's tests at a false discovery rate of {fdr:g} "
           "(Benjamini-Hochberg); every number comes with its 95 % interval and is in findings.csv with the counts behind it."]
    _, attr_basis = _attribute_findings(tables, fdr)
    out.append("Attributes: " + attr_basis + ".")
    if tables.get("signature_contexts") is None:
        out.append("Contexts: no signature_contexts table in this run.")
    return out


def summary_lines(findings: pd.DataFrame) -> list[str]:
    """The closing terminal summary: one line per finding, grouped by brand (same sentences as the report)."""
    lines = []
    if findings is None or not len(findings):
        return ["findings: none of the study's results passed its tests (see the report's advice)"]
    for brand, g in findings.groupby("brand", sort=True):
        lines.append(f"{brand}:")
        lines += [f"  {int(r)}. {s}" for r, s in zip(g["rank"], g["sentence"])]
    return lines
