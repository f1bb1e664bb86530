"""Context-name confidence and the analyst's context edits (explore/context_names.py).

Outside references: scikit-learn's make_blobs for the clusters; the confidence is
checked against an independent normal approximation of the bootstrap (the mean
of a difference over m photos is about normal with sd / sqrt(m), central limit
theorem) rather than against our own resampling code.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from explore import contexts as ctx
from explore.context_names import WEAK_BELOW, apply_edits, name_confidence
from explore.study import ContextEdit, ContextSettings, StudyError, load_study


def _normal_win_probability(members: np.ndarray, a: int, b: int) -> float:
    """P(mean of S[:, a] - S[:, b] over a resample > 0) by the normal approximation."""
    d = members[:, a] - members[:, b]
    se = d.std(ddof=0) / math.sqrt(len(d))
    return 0.5 * (1 + math.erf(d.mean() / se / math.sqrt(2)))


def test_confidence_matches_a_normal_approximation_and_orders_clear_before_ambiguous():
    """Two phrases per context: context 1's photos clearly prefer phrase 0; context 2's
    photos sit almost between phrases 2 and 3. The bootstrap confidence must agree with
    the independent normal approximation, be high for the clear one and weak for the
    ambiguous one."""
    rng = np.random.default_rng(4)
    m = 80
    s = np.zeros((2 * m, 4), dtype=np.float32)
    s[:m, 0] = rng.normal(1.0, 1.0, m)
    s[:m, 1] = rng.normal(0.2, 1.0, m)
    s[m:, 2] = rng.normal(0.55, 1.0, m)
    s[m:, 3] = rng.normal(0.50, 1.0, m)
    s[:m, 2:] = rng.normal(-1.0, 0.3, (m, 2))  # context 1 dislikes context 2's phrases
    s[m:, :2] = rng.normal(-1.0, 0.3, (m, 2))
    labels = np.r_[np.ones(m, int), np.full(m, 2)]
    out = name_confidence(s, labels, np.array([1, 2]), {1: 0, 2: 2}, resamples=2000, seed=1).set_index("context_id")
    # With two contexts the rival comparison is within each context's own photos
    # (the "other contexts" term is the same for both phrases' columns only up to a
    # constant per phrase, which we add back for the approximation).
    affinity = np.stack([s[labels == c].mean(axis=0) for c in (1, 2)])
    others = affinity[::-1]
    for cid, a, b in ((1, 0, 1), (2, 2, 3)):
        members = s[labels == cid] - others[cid - 1]
        want = _normal_win_probability(members, a, b)
        got = out.loc[cid, "name_confidence"]
        print(f"context {cid}: bootstrap {got:.3f}, normal approximation {want:.3f}")
        assert got == pytest.approx(want, abs=0.04)
    assert out.loc[1, "name_confidence"] >= 0.99 > WEAK_BELOW > out.loc[2, "name_confidence"]
    assert out.loc[1, "runner_up_column"] == 1 and out.loc[2, "runner_up_column"] == 3
    assert out.loc[2, "name_margin"] == pytest.approx(
        (affinity[1, 2] - others[1, 2]) - (affinity[1, 3] - others[1, 3]), rel=1e-5)


def test_phrases_given_to_other_contexts_are_not_rivals():
    """Context 1 also likes phrase 2 a lot, but phrase 2 names context 2: no rival."""
    rng = np.random.default_rng(0)
    m = 60
    s = rng.normal(0, 0.1, (2 * m, 3)).astype(np.float32)
    s[:m, 0] += 1.0
    s[:m, 2] += 1.0  # as close as its own phrase
    s[m:, 2] += 3.0
    labels = np.r_[np.ones(m, int), np.full(m, 2)]
    out = name_confidence(s, labels, np.array([1, 2]), {1: 0, 2: 2}, seed=0).set_index("context_id")
    assert out.loc[1, "runner_up_column"] == 1
    assert out.loc[1, "name_confidence"] >= 0.99


def _blob_study(n_per=(60, 80, 100), seed=0):
    from sklearn.datasets import make_blobs

    x, y = make_blobs(n_samples=list(n_per), n_features=64, cluster_std=2.0, random_state=seed)
    rng = np.random.default_rng(seed)
    n = len(y)
    images = pd.DataFrame({
        "image_id": [f"img{i:04d}" for i in range(n)],
        "relpath": [f"photos/b{y[i]}/p{i:04d}.jpg" for i in range(n)],
        "brand": np.where(rng.random(n) < 0.5, "Alba", "Brisk"),
        "category": "main",
        "source": np.where(rng.random(n) < 0.5, "consumer", "owned"),
    })
    return images, x.astype(np.float32), y


def _tables(images, x, edits, order=None):
    basis = np.linalg.qr(np.random.default_rng(1).normal(size=(64, 64)))[0].astype(np.float32)
    order = np.arange(len(images)) if order is None else order
    settings = ContextSettings(min_cluster_size=20, edits=edits)
    return ctx.run_contexts(images, list(images.image_id.iloc[order]), x[order], x[order], settings, seed=3,
                            encode_texts=lambda p: basis[: len(p)], stability=False)


def test_edits_by_number_and_by_image_rename_merge_and_drop():
    images, x, y = _blob_study()
    plain = _tables(images, x, [])
    found = plain["image_contexts"].set_index("image_id")["context_id"]
    assert found.nunique() == 3 and (found > 0).all()
    blob_of = {int(found[images.image_id[y == b]].mode()[0]): b for b in range(3)}
    ctx_of_blob = {b: c for c, b in blob_of.items()}
    first_of_blob0 = images.image_id[y == 0].iloc[0]
    relpath_blob2 = images.relpath[y == 2].iloc[0]
    edits = [
        ContextEdit(image=first_of_blob0, name="campfire evenings", position=1),   # rename by image id
        ContextEdit(context=ctx_of_blob[1], merge_into=relpath_blob2, position=2),  # merge by number into an image path
        ContextEdit(image=relpath_blob2, name="sport and games", position=3),       # rename the merged context
    ]
    tables = _tables(images, x, edits)
    got = tables["image_contexts"].set_index("image_id")
    merged = ctx_of_blob[2]
    assert (got.loc[images.image_id[y == 1], "context_id"] == merged).all()
    assert (got.loc[images.image_id[y == 2], "context_id"] == merged).all()
    cx = tables["contexts"].set_index("context_id")
    assert cx.loc[merged, "size"] == int(((y == 1) | (y == 2)).sum())
    assert cx.loc[merged, "context"] == "sport and games" and cx.loc[merged, "name_source"] == "analyst"
    assert cx.loc[ctx_of_blob[0], "context"] == "campfire evenings"
    assert ctx_of_blob[1] not in cx.index  # merged away
    # every table counts the merged context's photos together
    bc = tables["brand_contexts"]
    row = bc[(bc.brand == "Alba") & (bc.source == "all") & (bc.context_id == merged)]
    alba = images.image_id[(images.brand == "Alba") & ((y == 1) | (y == 2))]
    assert int(row["count"].iloc[0]) == len(alba)
    assert list(tables["context_edits"]["action"]) == ["rename", "merge", "rename"]

    dropped = _tables(images, x, [ContextEdit(image=first_of_blob0, drop=True, position=1)])
    got = dropped["image_contexts"].set_index("image_id")
    assert (got.loc[images.image_id[y == 0], "context_id"] == ctx.UNASSIGNED_ID).all()
    cx = dropped["contexts"].set_index("context_id")
    assert cx.loc[ctx.UNASSIGNED_ID, "size"] == int((y == 0).sum())


def test_an_image_addressed_edit_survives_a_rerun_that_renumbers():
    """A second run on a different subset numbers the contexts differently; the edit
    addressed by an image still renames the context that image is in."""
    images, x, y = _blob_study(n_per=(60, 80, 100))
    anchor = images.image_id[y == 0].iloc[5]
    edit = [ContextEdit(image=anchor, name="the anchor's context", position=1)]
    first = _tables(images, x, edit)
    # drop most of blob 2, so blob 0 is no longer the smallest: numbering by size changes
    keep = np.flatnonzero((y != 2) | (np.arange(len(y)) % 4 == 0))
    sub = images.iloc[keep].reset_index(drop=True)
    second = _tables(sub, x[keep], edit)
    for tables in (first, second):
        ic = tables["image_contexts"].set_index("image_id")
        assert ic.loc[anchor, "context"] == "the anchor's context"
        named = ic[ic.context == "the anchor's context"].index
        assert set(named) == set(tables["image_contexts"].image_id[
            tables["image_contexts"].image_id.isin(images.image_id[y == 0])])
    n1 = first["image_contexts"].set_index("image_id").loc[anchor, "context_id"]
    n2 = second["image_contexts"].set_index("image_id").loc[anchor, "context_id"]
    assert n1 != n2  # the numbers did change


def test_weak_names_are_shown_as_numbers_with_three_candidates():
    """Contexts whose photos are equally close to several phrases: the shown name is
    'context N', the model's phrase kept as suggested_name, three candidates listed."""
    images, x, y = _blob_study()
    basis = np.linalg.qr(np.random.default_rng(1).normal(size=(64, 64)))[0].astype(np.float32)
    phrases = [f"phrase {i}" for i in range(8)]

    def encode(p):
        v = basis[: len(p)].copy()
        v[1] = v[0] + 1e-3 * basis[1]  # phrases 0 and 1 are near twins
        return v

    found = ctx.find_contexts(x, ContextSettings(min_cluster_size=20), seed=3)
    named = ctx.name_contexts(x, found.labels, phrases, encode(phrases), seed=0).set_index("context_id")
    weak = named[named.name_source == "zero-shot, weak"]
    strong = named[named.name_source == "zero-shot"]
    assert len(strong) and (strong.name_confidence >= WEAK_BELOW).all()
    assert (strong.context == strong.suggested_name).all()
    for cid, r in weak.iterrows():
        assert r.context == f"context {cid}" and r.name_confidence < WEAK_BELOW
        assert len(r.candidates.split(" | ")) == 3 and r.candidates.split(" | ")[0] == r.suggested_name


def test_apply_edits_refuses_what_it_cannot_find():
    labels = np.array([1, 1, 2, 2, -1])
    ids = np.array(["a", "b", "c", "d", "e"])
    with pytest.raises(StudyError, match=r"contexts.edits\[1\].*context 7 does not exist"):
        apply_edits(labels, ids, [ContextEdit(context=7, drop=True, position=1)])
    with pytest.raises(StudyError, match=r"contexts.edits\[2\].*image 'zz' is not among"):
        apply_edits(labels, ids, [ContextEdit(context=1, name="x", position=1),
                                  ContextEdit(image="zz", drop=True, position=2)])
    with pytest.raises(StudyError, match=r"image 'e' is in no context"):
        apply_edits(labels, ids, [ContextEdit(image="e", name="x", position=1)])
    with pytest.raises(StudyError, match="nothing to merge"):
        apply_edits(labels, ids, [ContextEdit(context=1, merge_into="b", position=1)])
    # chained merges: 1 into 2, then 2 into 3
    chained, _, _ = apply_edits(np.array([1, 2, 3]), np.array(["a", "b", "c"]),
                                [ContextEdit(context=1, merge_into=2, position=1),
                                 ContextEdit(context=2, merge_into=3, position=2)])
    assert list(chained) == [3, 3, 3]


@pytest.mark.parametrize("table, message", [
    ('context = 1\nimage = "a"\nname = "x"', "exactly one of 'context'"),
    ('context = 1\nname = "x"\ndrop = true', "exactly one action"),
    ('context = 1', "exactly one action"),
    ('context = 0\ndrop = true', "expected a context number"),
    ('context = 1\nmerge_into = true', "merge_into' is True"),
    ('context = 1\ncolour = "red"', "unknown key 'contexts.edits\\[1\\].colour'"),
    ('image = "a"\nname = ""', "is empty"),
    ('context = 2\ndrop = false', "leave the edit out"),
])
def test_study_file_edits_are_validated(tmp_path, table, message):
    (tmp_path / "photos").mkdir()
    (tmp_path / "study.toml").write_text(
        f'name = "t"\n[images]\nroot = "photos"\n[[contexts.edits]]\n{table}\n', encoding="utf-8")
    with pytest.raises(StudyError, match=message):
        load_study(tmp_path / "study.toml")


def test_study_file_edits_parse(tmp_path):
    (tmp_path / "photos").mkdir()
    (tmp_path / "study.toml").write_text(
        'name = "t"\n[images]\nroot = "photos"\n[contexts]\nfdr = 0.1\n'
        '[[contexts.edits]]\nimage = "Alba/consumer/p1.jpg"\nname = "breakfast at home"\n'
        '[[contexts.edits]]\ncontext = 4\nmerge_into = 2\n'
        '[[contexts.edits]]\ncontext = 5\ndrop = true\n', encoding="utf-8")
    study = load_study(tmp_path / "study.toml")
    assert study.contexts.fdr == 0.1
    e = study.contexts.edits
    assert [(x.image, x.name) for x in e[:1]] == [("Alba/consumer/p1.jpg", "breakfast at home")]
    assert (e[1].context, e[1].merge_into, e[2].drop, e[2].position) == (4, 2, True, 3)


def test_demo_report_and_tables_show_weak_names_as_numbers(demo_run):
    """End to end on the demo run: every weak context is 'context N' in contexts.csv,
    image_contexts.csv and the findings, and its card in the report says it has no
    confident name and lists the candidates."""
    cx = pd.read_csv(demo_run / "contexts.csv", keep_default_na=False)
    weak = cx[cx.name_source == "zero-shot, weak"]
    strong = cx[cx.name_source == "zero-shot"]
    assert len(strong) >= 1
    html = (demo_run / "report.html").read_text(encoding="utf-8")
    ic = pd.read_csv(demo_run / "image_contexts.csv", keep_default_na=False)
    for r in weak.itertuples():
        assert r.context == f"context {r.context_id}"
        assert set(ic.loc[ic.context_id == r.context_id, "context"]) == {r.context}
        assert r.candidates.replace(" | ", ", ") in html
    for r in strong.itertuples():
        assert r.context == r.suggested_name and float(r.name_confidence) >= WEAK_BELOW
    if len(weak):
        assert html.count("no confident name") >= len(weak)
    findings = pd.read_csv(demo_run / "findings.csv", keep_default_na=False)
    named_weak = set(weak.context)
    assert "sentence" in findings.columns
    for text in findings["sentence"].astype(str):
        for name in named_weak:
            if f"“{name}”" in text:
                assert "no confident name" in text


def test_edits_in_a_real_run_reach_every_table_and_the_report(demo_run, tmp_path):
    """`explore run` of the demo study with [[contexts.edits]] (a rename by image, a merge and a
    drop by number), on a copy of the demo's output folder (its cache: nothing is embedded)."""
    import shutil
    from pathlib import Path

    from explore.cli import main

    repo = Path(__file__).resolve().parent.parent
    demo = Path(demo_run)
    before = pd.read_parquet(demo / "image_contexts.parquet").merge(
        pd.read_parquet(demo / "images.parquet")[["image_id", "relpath"]], on="image_id")
    sizes = before[before.context_id > 0].groupby("context_id").size().sort_values()
    renamed, merged, target, dropped = sizes.index[-1], sizes.index[0], sizes.index[-2], sizes.index[1]
    anchor = before[before.context_id == renamed].sort_values("image_id").relpath.iloc[0]
    out = tmp_path / "out"
    shutil.copytree(demo / "cache", out / "cache", ignore=shutil.ignore_patterns("lock", "thumbnails_*"))
    text = (repo / "demo_images" / "study.toml").read_text(encoding="utf-8")
    for old, new in (('output = "../outputs/demo"', f'output = "{out}"'),
                     ('manifest = "manifest.csv"', f'manifest = "{repo / "demo_images" / "manifest.csv"}"'),
                     ('file = "survey.csv"', f'file = "{repo / "demo_images" / "survey.csv"}"'),
                     ('file = "labels.csv"', f'file = "{repo / "demo_images" / "labels.csv"}"')):
        assert old in text
        text = text.replace(old, new)
    text += (f'\n[[contexts.edits]]\nimage = "{anchor}"\nname = "our own name"\n'
             f"\n[[contexts.edits]]\ncontext = {merged}\nmerge_into = {target}\n"
             f"\n[[contexts.edits]]\ncontext = {dropped}\ndrop = true\n")
    study = tmp_path / "study.toml"
    study.write_text(text, encoding="utf-8")
    assert main(["--quiet", "run", str(study), "--encoder", "bundled"]) == 0

    after = pd.read_parquet(out / "image_contexts.parquet").set_index("image_id")
    by_demo = before.set_index("image_id")
    ids = lambda c: by_demo.index[by_demo.context_id == c]  # noqa: E731
    assert (after.loc[ids(renamed), "context"] == "our own name").all()
    assert after.loc[ids(merged), "context_id"].nunique() == 1
    assert after.loc[ids(merged), "context_id"].iloc[0] == after.loc[ids(target), "context_id"].iloc[0]
    assert (after.loc[ids(dropped), "context_id"] == -1).all()
    contexts = pd.read_csv(out / "contexts.csv")
    row = contexts[contexts.context == "our own name"]
    assert len(row) == 1 and row.name_source.iloc[0] == "analyst"
    assert len(contexts[contexts.context_id > 0]) == len(sizes) - 2
    counts = pd.read_parquet(out / "brand_contexts.parquet")
    merged_id = after.loc[ids(target), "context_id"].iloc[0]
    all_rows = counts[(counts.source == "all") & (counts.context_id == merged_id)]
    assert all_rows["count"].sum() == len(ids(merged)) + len(ids(target))  # counts after the merge
    edits = pd.read_csv(out / "context_edits.csv")
    assert edits.action.tolist() == ["rename", "merge", "drop"]
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "our own name" in page and "named by the analyst (study file)" in page
