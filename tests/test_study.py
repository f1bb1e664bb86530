"""The study file: valid files load, wrong keys and values are refused by name."""

from pathlib import Path

import pytest

from explore.study import StudyError, load_study

MINIMAL = """
name = "Trial"
output = "out"
[images]
root = "photos"
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_minimal_study_gets_documented_defaults(tmp_path):
    study = load_study(write(tmp_path, MINIMAL))
    assert study.name == "Trial"
    assert study.output == (tmp_path / "out").resolve()
    assert study.images.root == (tmp_path / "photos").resolve()
    assert study.encoder.name == "auto"
    # the default chosen by evidence (explore.encoders.catalogue.choose_default)
    assert (study.encoder.model, study.encoder.pretrained) == ("ViT-B-32-256", "datacomp_s34b_b86k")
    assert study.scoring.threshold == 0.5
    assert study.contexts.fdr == 0.05
    assert study.report.max_thumbnails == 5000  # README [report]: keeps a 100k-image report under 30 MB
    assert study.category_of("Unlisted") == "all"


def test_full_study_reads_every_section(tmp_path):
    text = 'seed = 3\n' + MINIMAL + """
[brands]
"Brook & Pine" = "apparel"
[encoder]
name = "bundled"
batch_size = 8
[scoring]
templates = ["a snapshot that feels {}"]
threshold = 0.6
[contexts]
min_cluster_size = 12
extra_phrases = ["a rooftop garden"]
[survey]
file = "survey.csv"
[[attribute]]
name = "rugged"
positive = ["rugged and outdoorsy"]
negative = ["delicate and indoor", "polished"]
threshold = 0.4
"""
    study = load_study(write(tmp_path, text))
    assert study.seed == 3
    assert study.category_of("Brook & Pine") == "apparel"
    assert study.encoder.name == "bundled" and study.encoder.batch_size == 8
    assert study.contexts.min_cluster_size == 12
    assert study.survey.file == (tmp_path / "survey.csv").resolve()
    [attr] = study.attributes
    assert attr.negative == ["delicate and indoor", "polished"]
    assert attr.threshold == 0.4


@pytest.mark.parametrize(
    "extra, words",
    [
        ('colour = "red"\n', ["unknown key 'colour'"]),
        ('[encoder]\nname = "gpu-model"\n', ["encoder.name", "auto"]),
        ('[encoder]\nbatchsize = 4\n', ["encoder.batchsize", "batch_size"]),
        ('[scoring]\nthreshold = "high"\n', ["scoring.threshold", "number"]),
        ('[scoring]\ntemplates = ["a photo of {thing}"]\n', ["{thing}", "exactly one"]),
        ('[contexts]\nfdr = true\n', ["contexts.fdr"]),
    ],
)
def test_wrong_keys_and_values_are_refused_with_file_and_key(tmp_path, extra, words):
    text = extra + MINIMAL if not extra.startswith("[") else MINIMAL + extra
    path = write(tmp_path, text)
    with pytest.raises(StudyError) as err:
        load_study(path)
    message = str(err.value)
    assert str(path) in message
    for word in words:
        assert word in message


@pytest.mark.parametrize(
    "attribute, words",
    [
        ('name = "calm"\npositive = ["calm"]\nnegative = []', ["'calm'", "no negative"]),
        ('name = "calm"\npositive = [" "]\nnegative = ["busy"]', ["'calm'", "empty positive"]),
        ('name = "calm"\npositive = ["calm {x}"]\nnegative = ["busy"]', ["'calm'", "brace"]),
        ('name = "calm"\npositive = ["calm"]\nnegative = ["busy"]\ncolour = 1', ["'calm'", "colour"]),
    ],
)
def test_bad_attribute_definitions_name_the_attribute(tmp_path, attribute, words):
    path = write(tmp_path, MINIMAL + "[[attribute]]\n" + attribute + "\n")
    with pytest.raises(StudyError) as err:
        load_study(path)
    for word in words:
        assert word in str(err.value)


def test_duplicate_attribute_names_are_refused(tmp_path):
    block = '[[attribute]]\nname = "calm"\npositive = ["calm"]\nnegative = ["busy"]\n'
    with pytest.raises(StudyError, match="'calm' is defined twice"):
        load_study(write(tmp_path, MINIMAL + block + block))


def test_missing_image_source_and_bad_toml_are_refused(tmp_path):
    with pytest.raises(StudyError, match="needs 'root'"):
        load_study(write(tmp_path, 'name = "x"\n'))
    with pytest.raises(StudyError, match="not valid TOML"):
        load_study(write(tmp_path, "name = \n"))
    with pytest.raises(StudyError, match="not found"):
        load_study(tmp_path / "absent.toml")
