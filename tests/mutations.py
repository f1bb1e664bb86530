"""Mutation check: each plausible bug in the statistics must make at least one test fail.

Run from the repository root (not collected by pytest: the name has no ``test_``):

    .venv/bin/python tests/mutations.py            # every mutation
    .venv/bin/python tests/mutations.py delong     # those whose name contains "delong"

For each mutation the package and tests are copied to a temporary folder, one
exact piece of source text is replaced there (never in the checkout), and the
named tests run against the copy. A mutation is "caught" when those tests
fail. The unmutated copy must pass the same tests first, so a test that fails
for another reason cannot count as catching anything. Exit status 1 when a
mutation survives or a baseline fails.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

#: (name, file, original text, mutated text, pytest arguments selecting the tests)
MUTATIONS = [
    ("delong-se-halved", "explore/attributes/check.py",
     "se = float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))",
     "se = 0.5 * float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))",
     ["tests/test_attribute_inference.py", "-k", "delong"]),
    ("delong-se-doubled", "explore/attributes/check.py",
     "se = float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))",
     "se = 2.0 * float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))",
     ["tests/test_attribute_inference.py", "-k", "delong"]),
    ("delong-no-negative-class-term", "explore/attributes/check.py",
     "se = float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))",
     "se = float(np.sqrt(v10.var(ddof=1) / n1))",
     ["tests/test_attribute_inference.py", "-k", "delong"]),
    ("probe-scored-in-sample", "explore/attributes/check.py",
     'cv_probabilities = cross_val_predict(model, X, y, cv=cv, method="predict_proba")[:, 1]',
     "cv_probabilities = model.fit(X, y).predict_proba(X)[:, 1]",
     ["tests/test_attribute_inference.py", "-k", "probe"]),
    ("bootstrap-one-cell-only", "explore/attributes/shares.py",
     "mean_low, mean_high = _percentiles(sum(cells[k][1] for k in keys) / n)",
     "mean_low, mean_high = _percentiles(cells[keys[0]][1] / len(cells[keys[0]][0]))",
     ["tests/test_attribute_inference.py", "-k", "bootstrap"]),
    ("gap-test-one-direction", "explore/attributes/clustering.py",
     "p = 2 * norm.sf(np.abs(zstat))",
     "p = 2 * norm.sf(zstat)",
     ["tests/test_clustering.py", "-k", "two_sided or independent_method"]),
    ("gap-test-one-tail", "explore/attributes/clustering.py",
     "p = 2 * norm.sf(np.abs(zstat))",
     "p = norm.sf(np.abs(zstat))",
     ["tests/test_clustering.py", "-k", "two_sided or independent_method"]),
    ("mann-whitney-reversed", "explore/attributes/check.py",
     'alternative="greater"',
     'alternative="less"',
     ["tests/test_attribute_inference.py", "-k", "mann_whitney"]),
    ("youden-worst-threshold (explore check)", "explore/attributes/check.py",
     "k = int(np.argmax(j))",
     "k = int(np.argmin(j))",
     ["tests/test_attributes.py", "-k", "check_command_reports"]),
    ("design-effect-ignored", "explore/attributes/clustering.py",
     "deff = np.where(inner, np.maximum(v_cluster / v_srs, 1.0), 1.0)",
     "deff = np.ones(k)",
     ["tests/test_clustering.py", "-k", "simulation or gee"]),
    ("bh-without-step-up", "explore/attributes/testing.py",
     "adjusted = np.minimum.accumulate(scaled[::-1])[::-1]",
     "adjusted = scaled",
     ["tests/test_clustering.py", "-k", "benjamini"]),
    ("cmh-variance-without-n-minus-1", "explore/attributes/context_adjust.py",
     "(total**2 * np.maximum(total - 1, 1))",
     "(total**2 * total)",
     ["tests/test_context_adjust.py", "-k", "statsmodels or published"]),
    ("context-mix-weights-swapped", "explore/attributes/context_adjust.py",
     "mix = float(((c - o) * (r1 + r2) / 2).sum())",
     "mix = float(((c - o) * r1).sum())",
     ["tests/test_context_adjust.py", "-k", "kitagawa or artefact"]),
    # compare and contexts (issue 13, outside explore/attributes/)
    ('ctx-bh-filter-dropped (brand x context)', 'explore/contexts/tables.py',
     'family = (table["category_count"] >= min_margin).to_numpy()',
     'family = np.ones(len(table), dtype=bool)',
     ['tests/test_contexts.py', '-k', 'test_bh_family_leaves_out_rows_below_min_count']),
    ('ctx-bh-filter-dropped (consumer vs owned)', 'explore/contexts/tables.py',
     'family = ((out["consumer_count"] + out["owned_count"]) >= settings.min_count).to_numpy()',
     'family = np.ones(len(out), dtype=bool)',
     ['tests/test_contexts.py', '-k', 'test_bh_family_leaves_out_rows_below_min_count']),
    ('agreement-significant-from-raw-p', 'explore/compare/agreement.py',
     'table["significant"] = (table["kendall_q"] <= fdr)',
     'table["significant"] = (table["kendall_p"] <= fdr)',
     ['tests/test_compare.py', '-k', 'test_agreement_family_is_corrected_by_benjamini_hochberg']),
    ('agreement-exact-p-without-observed', 'explore/compare/agreement.py',
     'below = np.searchsorted(null_sorted, abs(observed) - tol, side="left")',
     'below = np.searchsorted(null_sorted, abs(observed) + tol, side="right")',
     ['tests/test_compare.py', '-k', 'test_exact_p_three_brands_can_never_go_below_one_third']),
    ('agreement-exact-pearson-one-sided', 'explore/compare/agreement.py',
     'hits += int(np.sum(np.abs(zy[orders[start:start + chunk]] @ zx) >= r_obs - tol))',
     'hits += int(np.sum((zy[orders[start:start + chunk]] @ zx) >= r_obs - tol))',
     ['tests/test_compare.py', '-k', 'test_exact_p_matches_scipy_permutation_test']),
    ('agreement-kendall-interval-wrong-se', 'explore/compare/agreement.py',
     '("kendall", _fieller_se(n, 0.437, 4))',
     '("kendall", _fieller_se(n, 1.0, 3))',
     ['tests/test_compare.py', '-k', 'test_rank_correlation_intervals_cover_the_truth_at_the_stated_rate']),
    ('protest-wrong-direction', 'explore/compare/uncertainty.py',
     'hits = int(np.sum(_disparities(a, b, orders) <= observed + tol))\n        p, used, method',
     'hits = int(np.sum(_disparities(a, b, orders) >= observed - tol))\n        p, used, method',
     ['tests/test_compare.py', '-k', 'test_protest_exact_matches_an_independent_enumeration_with_scipy']),
    ('map-moves-most-rule-dropped', 'explore/compare/summary.py',
     'if best["moves_most_share"] >= MOVES_MOST_SHARE:',
     'if True:',
     ['tests/test_compare.py', '-k', 'test_bootstrap_names_a_brand_only_when_it_moves_most_in_most_replicates']),
    ('map-bootstrap-ignores-posters', 'explore/compare/uncertainty.py',
     '        if (text != "").any():\n            return text.where',
     '        if False:\n            return text.where',
     ['tests/test_compare.py', '-k', 'test_bootstrap_resamples_posters_when_the_images_table_names_them']),
    ('ctx-tests-ignore-posters', 'explore/contexts/tables.py',
     '    poster = frame.get("poster")\n    if poster is None:',
     '    poster = None\n    if poster is None:',
     ['tests/test_contexts.py', '-k', 'test_poster_permutation_equals_an_independent_enumeration']),
    ('ctx-stability-ari-with-unassigned', 'explore/contexts/fit.py',
     'ari = float(adjusted_rand_score(main[both], other[both]))',
     'ari = float(adjusted_rand_score(main, other))',
     ['tests/test_contexts.py', '-k', 'test_stability_ari_is_on_images_assigned_in_both']),
    ('format-tiny-p-as-zero', 'explore/compare/summary.py',
     'return "< 0.001" if p < 0.001 else f"{p:.3f}"',
     'return f"{p:.3f}"',
     ['tests/test_compare.py', '-k', 'test_p_values_are_never_printed_as_zero']),
]


def _copy_tree(target: Path) -> None:
    for name in ("explore", "tests"):
        shutil.copytree(REPO / name, target / name, ignore=shutil.ignore_patterns("__pycache__"))
    for name in ("pyproject.toml",):
        shutil.copy2(REPO / name, target / name)


def _run_tests(folder: Path, args: list[str]) -> tuple[int, str]:
    env = dict(os.environ, PYTHONPATH=str(folder))
    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider", *args],
        cwd=folder, env=env, capture_output=True, text=True,
    )
    tail = [line for line in proc.stdout.splitlines() if line.strip()][-1:] or [""]
    return proc.returncode, tail[0]


def main(argv: list[str]) -> int:
    chosen = [m for m in MUTATIONS if not argv or any(a in m[0] for a in argv)]
    failures = 0
    baselines: dict[tuple, tuple[int, str]] = {}
    print(f"{'mutation':42s} {'result':10s} tests")
    for name, path, old, new, args in chosen:
        started = time.perf_counter()
        with tempfile.TemporaryDirectory(prefix="explore-mutation-") as tmp:
            folder = Path(tmp)
            _copy_tree(folder)
            key = tuple(args)
            if key not in baselines:
                baselines[key] = _run_tests(folder, args)
            code, tail = baselines[key]
            if code != 0:
                print(f"{name:42s} {'BASELINE FAILS':10s} {' '.join(args)}: {tail}")
                failures += 1
                continue
            source = folder / path
            text = source.read_text(encoding="utf-8")
            if text.count(old) != 1:
                print(f"{name:42s} {'NOT APPLIED':10s} '{old}' found {text.count(old)} times in {path}")
                failures += 1
                continue
            source.write_text(text.replace(old, new), encoding="utf-8")
            code, tail = _run_tests(folder, args)
        caught = code != 0
        failures += not caught
        print(f"{name:42s} {'caught' if caught else 'SURVIVED':10s} {' '.join(args)} -> {tail} "
              f"({time.perf_counter() - started:.0f} s)")
    print(f"{len(chosen) - failures} of {len(chosen)} mutations caught")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
