"""Commercial-post flag: outside constructed examples, exclusion of consumer rows, study key.

Outside material: Debian openclipart-png clip art, Debian documentation text
(/usr/share/doc/*/copyright) rendered by PIL, scikit-image's sample photos
(benchmarks/commercial_set.py builds them; set "outside-commercial-v1").
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from explore import commercial
from explore.embed import Embeddings

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

pytestmark = pytest.mark.skipif(not Path("/usr/share/openclipart/png").is_dir(), reason="needs Debian openclipart-png")


def outside_examples():
    import commercial_set

    images, labels, kinds = commercial_set.build(n_per_kind=3, seed=7)
    return images, labels, kinds


def test_plain_border_separates_constructed_outside_examples():
    images, labels, _ = outside_examples()
    plain = np.array([commercial.plain_border_share(im) for im in images])
    kinds = np.asarray(outside_examples()[2])
    # product shots on plain colour have an entirely plain border (computed, not assumed)
    assert (plain[kinds == "product on plain background"] > 0.95).all()
    assert plain[labels == 1].mean() - plain[labels == 0].mean() > 0.2
    from sklearn.metrics import roc_auc_score  # scikit-learn reference metric

    assert roc_auc_score(labels, plain) > 0.75


def fake_encode_texts(texts):
    """Commercial prompts -> e1, photo prompts -> e2 (so margin = joint[0] - joint[1])."""
    out = np.zeros((len(texts), 4), np.float32)
    for k, t in enumerate(texts):
        out[k, 0 if t in commercial.COMMERCIAL_PROMPTS else 1] = 1
    return out


def write_rows(tmp_path):
    images, labels, kinds = outside_examples()
    rows = []
    for k, (im, lab) in enumerate(zip(images, labels)):
        for source in ("consumer", "owned"):
            path = tmp_path / f"{source}_{k}.png"
            im.save(path)
            rows.append({"image_id": f"{source}{k}", "path": str(path), "brand": "Fizzwick", "source": source,
                         "status": "ok", "reason": "", "label": int(lab)})
    table = pd.DataFrame(rows)
    joint = np.zeros((len(table), 4), np.float32)
    joint[:, 0], joint[:, 1] = 0.45, 0.55  # margin -0.1, about the bundled encoder's typical value
    joint /= np.linalg.norm(joint, axis=1, keepdims=True)
    emb = Embeddings(image_ids=table["image_id"].tolist(), encoder_id="fake", cluster=joint.copy(), joint=joint)
    return table, emb


def test_exclude_drops_flagged_consumer_rows_only(tmp_path):
    table, emb = write_rows(tmp_path)
    out, kept, notes = commercial.flag_commercial(table, emb, fake_encode_texts, mode="exclude")
    consumer = out[out["source"] == "consumer"]
    owned = out[out["source"] == "owned"]
    flagged = consumer["commercial_flagged"].astype(bool)
    # computed flags agree with the outside labels for most constructed consumer examples
    assert (flagged == consumer["label"].astype(bool)).mean() >= 0.8
    assert flagged.sum() >= 6
    assert (consumer.loc[flagged, "status"] == "commercial").all()
    assert (consumer.loc[flagged, "commercial_reason"] != "").all()
    assert (owned["status"] == "ok").all() and not owned["commercial_flagged"].any()
    assert owned["commercial_score"].isna().all()
    assert len(kept) == len(emb) - int(flagged.sum())
    assert set(kept.image_ids) == set(out.loc[out["status"] == "ok", "image_id"])
    assert f"{int(flagged.sum())} of {len(consumer)} consumer photos flagged" in notes[0]

    kept_out, kept_emb, _ = commercial.flag_commercial(table, emb, fake_encode_texts, mode="keep")
    assert (kept_out["status"] == "ok").all()
    assert len(kept_emb) == len(emb)
    assert kept_out["commercial_flagged"].sum() == flagged.sum()
    per_source_default = out[out["status"] == "ok"].groupby("source").size()
    per_source_keep = kept_out[kept_out["status"] == "ok"].groupby("source").size()
    assert per_source_keep["consumer"] - per_source_default["consumer"] == flagged.sum()
    assert per_source_keep["owned"] == per_source_default["owned"]


def test_study_key_validated(tmp_path):
    from explore.study import StudyError, load_study

    (tmp_path / "imgs").mkdir()
    for value, ok in (("keep", True), ("drop", False)):
        path = tmp_path / "s.toml"
        path.write_text(f'[images]\nroot = "imgs"\ncommercial_posts = "{value}"\n')
        if ok:
            assert load_study(path).images.commercial_posts == "keep"
        else:
            with pytest.raises(StudyError, match="images.commercial_posts"):
                load_study(path)


def test_labels_on_dropped_rows_remap_or_are_left_out_with_a_reason():
    from explore import attributes as A

    images = pd.DataFrame({
        "image_id": ["keep1", "near1", "shop1", "rep1", "own1"],
        "path": [f"/x/{i}.jpg" for i in range(5)],
        "relpath": [f"B/consumer/{i}.jpg" for i in range(5)],
        "status": ["ok", "near_duplicate", "commercial", "repost", "ok"],
        "near_duplicate_of": ["", "keep1", "", "", ""],
        "repost_of": ["", "", "", "own1", ""],
    })
    table = pd.DataFrame({"image": ["near1", "shop1", "rep1"], "attribute": ["sunny"] * 3, "label": [1, 0, 1]})
    labels, warnings = A.read_labels(table, images, ["sunny"], where="labels.csv")
    # the near-duplicate's label goes to its kept representative; the others are not used
    assert labels.image_id.tolist() == ["keep1"] and labels.label.tolist() == [1]
    assert any("row 3" in w and "commercial post" in w and "not used for corrected shares" in w for w in warnings)
    assert any("row 4" in w and "repost" in w and "not used for corrected shares" in w for w in warnings)


def test_known_plain_shares_are_not_measured_again(tmp_path):
    # A re-run passes the plain shares measured before (by content hash): the same flags and
    # scores come out without opening a file (here the files are gone).
    table, emb = write_rows(tmp_path)
    table["sha256"] = [f"sha{k}" for k in range(len(table))]
    first, _, _ = commercial.flag_commercial(table, emb, fake_encode_texts, mode="exclude")
    measured = first[first["commercial_plain"].notna()]
    assert len(measured) == (table["source"] == "consumer").sum()
    known = dict(zip(measured["sha256"], measured["commercial_plain"]))
    for path in table["path"]:
        Path(path).unlink()
    said = []
    again, _, _ = commercial.flag_commercial(table, emb, fake_encode_texts, mode="exclude", log=said.append,
                                             known_plain=known)
    assert said == []  # nothing opened, nothing failed
    pd.testing.assert_frame_equal(again, first)
    # without them the missing files are named and the flags change
    lost, _, _ = commercial.flag_commercial(table, emb, fake_encode_texts, mode="exclude", log=said.append)
    assert len(said) == len(measured) and lost["commercial_plain"].isna().all()
