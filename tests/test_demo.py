"""The demo scenario (demo_images/), `explore demo` and `explore init`.

The demo plants structure on purpose (demo_images/make_demo.py); these tests
check that the files are what they claim, that the planted structure is strong
enough for the statistics the tool uses to flag it, that the planted contexts
are visible to the bundled encoder and not to colour alone, and that the two
first commands a user types work.
"""

from __future__ import annotations

import importlib.util
import io
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_images"
AAKER = ("sincerity", "excitement", "competence", "sophistication", "ruggedness")


def _make_demo_module():
    spec = importlib.util.spec_from_file_location("make_demo", DEMO / "make_demo.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def truth() -> pd.DataFrame:
    return pd.read_csv(DEMO / "truth_images.csv", dtype={"accent": str}, keep_default_na=False)


@pytest.fixture(scope="module")
def truth_brands() -> pd.DataFrame:
    return pd.read_csv(DEMO / "truth_brands.csv", dtype=str, keep_default_na=False)


# --------------------------------------------------------------------------
# The shipped files


def test_demo_files_have_the_promised_shape(truth):
    manifest = pd.read_csv(DEMO / "manifest.csv", dtype=str, keep_default_na=False)
    assert list(manifest.columns) == ["path", "brand", "source", "category", "posted_at"]
    assert 400 <= len(manifest) <= 600
    assert list(manifest.path) == list(truth.path)
    assert set(manifest.source) == {"consumer", "owned"}
    assert manifest.groupby("brand").source.nunique().eq(2).all()
    assert manifest.groupby("category").brand.nunique().to_dict() == {"apparel": 3, "drinks": 3}
    assert 6 <= truth.context.nunique() <= 8

    total = 0
    for rel in manifest.path:
        path = DEMO / rel
        with Image.open(path) as img:
            assert img.format == "JPEG", rel
            assert max(img.size) <= 256, rel
        total += path.stat().st_size
    assert total <= 12 * 1024 * 1024, f"images take {total / 2**20:.1f} MB"


def test_study_file_loads_and_names_the_demo(truth):
    from explore.study import load_study

    study = load_study(DEMO / "study.toml")
    assert study.output == (REPO / "outputs" / "demo").resolve()
    assert study.encoder.name == "auto"
    assert set(study.brands) == set(truth.brand)
    assert study.brands == truth.groupby("brand").category.first().to_dict()
    names = [a.name for a in study.attributes]
    assert set(AAKER) <= set(names) and len(names) > len(AAKER)
    assert study.survey.file == (DEMO / "survey.csv").resolve()
    assert study.images.manifest == (DEMO / "manifest.csv").resolve()


def test_survey_covers_every_brand_and_attribute(truth, truth_brands):
    survey = pd.read_csv(DEMO / "survey.csv")
    assert list(survey.columns) == ["brand", "attribute", "score", "category", "sample_size"]
    assert set(survey.brand) == set(truth.brand)
    assert set(AAKER) <= set(survey.attribute)
    assert survey.score.between(1, 7).all()
    # exactly one brand is planted to disagree with its photos
    assert (truth_brands.survey_agrees == "false").sum() == 1


def test_planted_attribute_levels_follow_the_planted_directions(truth):
    """Per category, the brand named as planted top has the highest planted level."""
    attrs = pd.read_csv(DEMO / "truth_attributes.csv", dtype={"planted_top": str, "direction_planted": str})
    levels = truth.groupby(["category", "brand"])[list(AAKER) + ["outdoors"]].mean()
    for row in attrs[attrs.planted_top == "true"].itertuples():
        level = levels.loc[row.category][row.attribute]
        others = level.drop(row.brand)
        assert level[row.brand] >= others.max() + 0.15, (row.brand, row.attribute, level.to_dict())
    survey = pd.read_csv(DEMO / "survey.csv")
    joined = attrs.merge(survey, on=["brand", "attribute", "category"])
    # where a direction is planted, the survey ranks the planted top brand first,
    # except where the survey is planted to disagree
    checked = 0
    for (category, attribute), group in joined.groupby(["category", "attribute"]):
        if not (group.direction_planted == "true").all():
            continue
        top_survey = group.loc[group.score.idxmax(), "brand"]
        top_planted = group.loc[group.planted_level.idxmax(), "brand"]
        agrees = group.survey_agrees.astype(str).str.lower().eq("true").all()
        assert (top_survey == top_planted) == agrees, (category, attribute)
        checked += 1
    assert checked >= 6


def test_planted_context_structure_is_statistically_clear(truth, truth_brands):
    """The planted signature, unexpected and consumer-vs-owned contexts pass the tests
    the contexts stage uses: Fisher's exact test (scipy.stats.fisher_exact) of the
    brand against the rest of its category, Benjamini-Hochberg control at 5 %
    (statsmodels.stats.multitest.multipletests(method="fdr_bh")) over the whole
    brand x context table, and an index of at least 120 (100 = parity, common
    marketing practice)."""
    from scipy.stats import fisher_exact
    from statsmodels.stats.multitest import multipletests

    rows = []
    for brand, group in truth.groupby("brand"):
        category = group.category.iloc[0]
        rest = truth[(truth.category == category) & (truth.brand != brand)]
        whole = truth[truth.category == category]
        for context in sorted(truth.context.unique()):
            a, b = int((group.context == context).sum()), int((group.context != context).sum())
            c, d = int((rest.context == context).sum()), int((rest.context != context).sum())
            p = fisher_exact([[a, b], [c, d]])[1]
            index = 100 * (a / len(group)) / max((whole.context == context).mean(), 1e-9)
            rows.append(dict(brand=brand, context=context, count=a, p=p, index=index))
    table = pd.DataFrame(rows)
    table["q"] = multipletests(table.p, method="fdr_bh")[1]
    for row in truth_brands.itertuples():
        for context in row.signature_contexts.split():
            hit = table[(table.brand == row.brand) & (table.context == context)].iloc[0]
            assert hit["q"] < 0.05 and hit["index"] >= 120 and hit["count"] >= 5, hit.to_dict()

    # the unexpected context: rare in the rest of the brand's category, common in the other
    unexpected = truth_brands[truth_brands.unexpected_context != ""]
    assert len(unexpected) == 1
    brand, context = unexpected.brand.iloc[0], unexpected.unexpected_context.iloc[0]
    category = truth[truth.brand == brand].category.iloc[0]
    rest = truth[(truth.category == category) & (truth.brand != brand)]
    other = truth[truth.category != category]
    assert (rest.context == context).mean() < 0.05
    assert (other.context == context).mean() > 0.15

    # consumer vs owned: both named contexts differ significantly between sources
    diff = truth_brands[truth_brands.consumer_favours != ""]
    assert len(diff) == 1
    brand = diff.brand.iloc[0]
    mine = truth[truth.brand == brand]
    for context, favoured in ((diff.consumer_favours.iloc[0], "consumer"), (diff.owned_favours.iloc[0], "owned")):
        cons = mine[mine.source == "consumer"].context == context
        own = mine[mine.source == "owned"].context == context
        p = fisher_exact([[cons.sum(), (~cons).sum()], [own.sum(), (~own).sum()]])[1]
        assert p < 0.001, (context, p)
        assert (cons.mean() > own.mean()) == (favoured == "consumer")


def test_generator_reproduces_the_committed_images():
    """make_demo.py is seeded: regenerating the first pictures gives identical bytes."""
    make_demo = _make_demo_module()
    if not make_demo.CLIPART.is_dir():
        pytest.skip("openclipart-png is not installed (apt-get install -y openclipart-png)")
    rng = np.random.default_rng(make_demo.SEED)
    rows = make_demo.plan(rng)
    for row in rows[:4]:
        img = make_demo.compose(rng, row["context"], row["brand"], row["accent"])
        buffer = io.BytesIO()
        img.save(buffer, "JPEG", quality=85, optimize=True)
        rng.integers(0, 300 * 24 * 60)  # the posted_at draw, as in main()
        assert buffer.getvalue() == (DEMO / row["path"]).read_bytes(), row["path"]


# --------------------------------------------------------------------------
# The demo run


def test_explore_demo_writes_its_outputs(demo_run):
    import json

    assert demo_run == REPO / "outputs" / "demo"
    run = json.loads((demo_run / "run.json").read_text())
    assert (demo_run / "images.csv").is_file() and (demo_run / "images.parquet").is_file()
    images = pd.read_csv(demo_run / "images.csv")
    manifest = pd.read_csv(DEMO / "manifest.csv")
    assert len(images) == len(manifest)
    assert (images.status == "ok").all()
    assert "bundled" in json.dumps(run)
    stdout = (demo_run / "demo_stdout.txt").read_text()
    assert "encoder:" in stdout and "outputs:" in stdout


def test_demo_labels_are_a_random_sample_answered_by_the_planted_truth(truth):
    """demo_images/labels.csv is what make_labels.py writes: a seeded random sample within
    brand x source (explore's own sampler, recomputed here) with every answer equal to the
    planted level in truth_images.csv."""
    from explore.attributes.sampling import random_sample
    from explore.collect import collect_study_images
    from explore.study import load_study

    labels = pd.read_csv(DEMO / "labels.csv", dtype=str, keep_default_na=False)
    study = load_study(DEMO / "study.toml")
    assert study.labels.file == (DEMO / "labels.csv").resolve()
    images = collect_study_images(study, progress=False)
    sample = random_sample(images, int(labels["image"].nunique()), seed=int(labels["seed"].iloc[0]))
    relpath = dict(zip(images.image_id.astype(str), images.relpath.astype(str)))
    assert sorted(labels["image"].unique()) == sorted(relpath[str(i)] for i in sample.image_id)
    planted = truth.set_index("path")
    answers = labels.apply(lambda r: int(planted.loc[r["image"], r["attribute"]]), axis=1)
    assert ((labels["label"] == "yes") == (answers == 1)).all()
    assert set(labels["attribute"]) == {a.name for a in study.attributes}
    assert (labels["sample"] == "random").all()


def test_demo_corrected_shares_cover_the_planted_truth(demo_run, truth):
    """Estimand check end to end: the demo's planted per brand x source prevalence of each
    attribute lies inside the report's corrected-share 95 % interval in most cells, and
    inside the yes-rate interval far less often (the yes-rate estimates the model's
    yes-rate, not the prevalence). At 95 % coverage 72 cells give about 68 covered
    (binomial sd 1.8); 62 leaves room for chance, and the yes-rate (22 here) fails it."""
    shares = pd.read_csv(demo_run / "attribute_shares.csv")
    cells = shares[(shares.level == "brand") & shares.source.isin(["consumer", "owned"])]
    attrs = sorted(cells.attribute.unique())
    planted = (truth.melt(id_vars=["brand", "source"], value_vars=attrs, var_name="attribute")
               .assign(value=lambda t: t.value.astype(float))
               .groupby(["brand", "source", "attribute"]).value.mean().rename("truth").reset_index())
    m = cells.merge(planted, on=["brand", "source", "attribute"], validate="one_to_one")
    assert len(m) == 72 and m.share.notna().all()
    covered = int(((m.share_low <= m.truth) & (m.truth <= m.share_high)).sum())
    yes_rate_covered = int(((m.yes_rate_low <= m.truth) & (m.truth <= m.yes_rate_high)).sum())
    error = float((m.share - m.truth).abs().mean())
    print(f"\ndemo: corrected shares cover the planted prevalence in {covered} of 72 cells "
          f"(yes-rate intervals {yes_rate_covered}); mean absolute error {error:.3f}")
    assert covered >= 62
    assert yes_rate_covered < covered
    assert error < 0.12
    stdout = (demo_run / "demo_stdout.txt").read_text()
    assert "corrected shares from 120 random labels" in stdout


def _colour_histograms(paths) -> np.ndarray:
    """16 bins per RGB channel, concatenated and normalised to sum 1."""
    rows = []
    for path in paths:
        arr = np.asarray(Image.open(path).convert("RGB"))
        hist = [np.histogram(arr[..., c], bins=16, range=(0, 256))[0] for c in range(3)]
        rows.append(np.concatenate(hist).astype(float))
    rows = np.array(rows)
    return rows / rows.sum(axis=1, keepdims=True)


def _loo_knn_accuracy(x: np.ndarray, y: np.ndarray) -> float:
    """Leave-one-out 5-nearest-neighbour accuracy, cosine distance (scikit-learn)."""
    from sklearn.model_selection import LeaveOneOut, cross_val_predict
    from sklearn.neighbors import KNeighborsClassifier

    knn = KNeighborsClassifier(n_neighbors=5, metric="cosine")
    predicted = cross_val_predict(knn, x, y, cv=LeaveOneOut())
    return float(np.mean(predicted == y))


def test_planted_context_is_visible_to_the_encoder_not_to_colour(demo_run, truth):
    """Leave-one-out 5-NN accuracy (sklearn KNeighborsClassifier, cosine) of the planted
    context from the bundled encoder's clustering vectors is at least 0.8, and clearly
    above the same test on a 16-bin-per-channel colour histogram (so the contexts are
    not colour swatches). The vectors come from the demo run's cache."""
    from explore import collect, embed
    from explore.encoders import load_encoder
    from explore.study import load_study

    study = load_study(DEMO / "study.toml")
    images = collect.collect_study_images(study, progress=False)
    encoder, _ = load_encoder("bundled")
    vectors, stats = embed.embed_table(images, encoder, cache_dir=demo_run / "cache", progress=False)
    ok = images[images.status == "ok"].set_index("image_id")
    relpaths = ok.loc[vectors.image_ids, "relpath"].tolist()
    context = truth.set_index("path").loc[relpaths, "context"].to_numpy().astype(str)

    knn_vectors = _loo_knn_accuracy(vectors.cluster, context)
    knn_colour = _loo_knn_accuracy(_colour_histograms([DEMO / p for p in relpaths]), context)
    print(f"\nleave-one-out 5-NN accuracy of the planted context ({len(context)} images, "
          f"{len(set(context))} contexts): bundled clustering vectors {knn_vectors:.3f}, "
          f"colour histogram {knn_colour:.3f}")
    assert knn_vectors >= 0.8
    assert knn_colour <= knn_vectors - 0.15


# --------------------------------------------------------------------------
# explore init


def _photo_tree(root: Path) -> None:
    sample = sorted((DEMO / "images").rglob("*.jpg"))[:3]
    for brand, source, src in (("Brand One", "consumer", sample[0]), ("Brand One", "owned", sample[1]),
                               ("Second", "Consumer", sample[2])):
        folder = root / brand / source
        folder.mkdir(parents=True, exist_ok=True)
        (folder / src.name).write_bytes(src.read_bytes())


def test_init_writes_a_study_that_loads(tmp_path, monkeypatch):
    from explore.cli import main
    from explore.study import load_study

    photos = tmp_path / "photos"
    _photo_tree(photos)
    monkeypatch.chdir(tmp_path)
    out = io.StringIO()
    with redirect_stdout(out):
        assert main(["init", "photos"]) == 0
    study = load_study(photos / "study.toml")
    assert study.brands == {"Brand One": "all", "Second": "all"}
    assert study.images.root == photos.resolve()
    assert study.encoder.name == "auto"
    assert [a.name for a in study.attributes] == list(AAKER)
    assert study.output == (tmp_path / "photos-results").resolve()
    assert "Brand One" in out.getvalue()
    # the same five prompt pairs as the demo study
    demo = {a.name: (a.positive, a.negative) for a in load_study(DEMO / "study.toml").attributes}
    for attr in study.attributes:
        assert demo[attr.name] == (attr.positive, attr.negative)


def test_init_refuses_to_overwrite_without_force(tmp_path, capsys):
    from explore.cli import main

    photos = tmp_path / "photos"
    _photo_tree(photos)
    target = tmp_path / "elsewhere" / "mine.toml"
    assert main(["init", str(photos), "--out", str(target)]) == 0
    target.write_text("# my edits\n" + target.read_text())
    assert main(["init", str(photos), "--out", str(target)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert target.read_text().startswith("# my edits")
    assert main(["init", str(photos), "--out", str(target), "--force"]) == 0
    assert not target.read_text().startswith("# my edits")
    from explore.study import load_study

    study = load_study(target)
    assert study.images.root == photos.resolve()


def test_init_refuses_a_folder_without_brand_folders(tmp_path, capsys):
    from explore.cli import main

    (tmp_path / "flat").mkdir()
    (tmp_path / "flat" / "a.jpg").write_bytes(b"x")
    assert main(["init", str(tmp_path / "flat")]) == 2
    assert "consumer" in capsys.readouterr().err
