"""Apply each plausible bug to the compare / contexts statistics and check a CI test fails.

Usage: python scripts/mutations_13a.py   (from the repository root; restores every file)
Each mutation is (file, original text, mutated text, tests to run). A mutation
"survives" when its tests still pass: that is a defect in the tests.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
C, A, U, S, P = ("explore/contexts.py", "explore/compare/agreement.py", "explore/compare/uncertainty.py",
                 "explore/compare/summary.py", "explore/report/page.py")
TC, TX = "tests/test_compare.py", "tests/test_contexts.py"
MUTATIONS = [
    ("BH filter (count >= min_count) dropped, brand x context", C,
     'family = (table["category_count"] >= min_margin).to_numpy()', 'family = np.ones(len(table), dtype=bool)',
     [TX + "::test_bh_family_leaves_out_rows_below_min_count"]),
    ("BH filter dropped, consumer vs owned", C,
     'family = ((out["consumer_count"] + out["owned_count"]) >= settings.min_count).to_numpy()',
     'family = np.ones(len(out), dtype=bool)', [TX + "::test_bh_family_leaves_out_rows_below_min_count"]),
    ("agreement significant from raw p, not BH q", A,
     'table["significant"] = (table["kendall_q"] <= fdr)', 'table["significant"] = (table["kendall_p"] <= fdr)',
     [TC + "::test_agreement_family_is_corrected_by_benjamini_hochberg"]),
    ("exact p leaves out the orderings equal to the observed one", A,
     'below = np.searchsorted(null_sorted, abs(observed) - tol, side="left")',
     'below = np.searchsorted(null_sorted, abs(observed) + tol, side="right")',
     [TC + "::test_exact_p_three_brands_can_never_go_below_one_third"]),
    ("exact Pearson p one-sided", A,
     'hits += int(np.sum(np.abs(zy[orders[start:start + chunk]] @ zx) >= r_obs - tol))',
     'hits += int(np.sum((zy[orders[start:start + chunk]] @ zx) >= r_obs - tol))',
     [TC + "::test_exact_p_matches_scipy_permutation_test"]),
    ("Kendall interval with Pearson's standard error", A,
     '("kendall", _fieller_se(n, 0.437, 4))', '("kendall", _fieller_se(n, 1.0, 3))',
     [TC + "::test_rank_correlation_intervals_cover_the_truth_at_the_stated_rate"]),
    ("PROTEST counts worse fits instead of better", U,
     'hits = int(np.sum(_disparities(a, b, orders) <= observed + tol))\n        p, used, method',
     'hits = int(np.sum(_disparities(a, b, orders) >= observed - tol))\n        p, used, method',
     [TC + "::test_protest_exact_matches_an_independent_enumeration_with_scipy"]),
    ("'moves most' rule dropped", S, 'if best["moves_most_share"] >= MOVES_MOST_SHARE:', 'if True:',
     [TC + "::test_bootstrap_names_a_brand_only_when_it_moves_most_in_most_replicates"]),
    ("bootstrap ignores posters", U, '        if (text != "").any():\n            return text.where',
     '        if False:\n            return text.where', [TC + "::test_bootstrap_resamples_posters_when_the_images_table_names_them"]),
    ("context tests ignore posters", C, '    poster = frame.get("poster")\n    if poster is None:',
     '    poster = None\n    if poster is None:', [TX + "::test_poster_permutation_equals_an_independent_enumeration"]),
    ("stability ARI over all images, unassigned included", C,
     'ari = float(adjusted_rand_score(main[both], other[both]))', 'ari = float(adjusted_rand_score(main, other))',
     [TX + "::test_stability_ari_is_on_images_assigned_in_both"]),
    ("tiny p printed as 0", S, 'return "< 0.001" if p < 0.001 else f"{p:.3f}"', 'return f"{p:.3f}"',
     [TC + "::test_p_values_are_never_printed_as_zero"]),
]


def main() -> int:
    survived = []
    for name, path, old, new, tests in MUTATIONS:
        file = ROOT / path
        text = file.read_text(encoding="utf-8")
        if text.count(old) != 1:
            print(f"SKIP {name}: original text found {text.count(old)} times in {path}")
            survived.append(name)
            continue
        file.write_text(text.replace(old, new), encoding="utf-8")
        try:
            proc = subprocess.run([sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider", *tests],
                                  cwd=ROOT, capture_output=True, text=True)
        finally:
            file.write_text(text, encoding="utf-8")
        killed = proc.returncode != 0
        print(f"{'killed ' if killed else 'SURVIVED'} {name}")
        if not killed:
            survived.append(name)
    print(f"{len(MUTATIONS) - len(survived)} of {len(MUTATIONS)} mutations fail a test")
    return 1 if survived else 0


if __name__ == "__main__":
    sys.exit(main())
