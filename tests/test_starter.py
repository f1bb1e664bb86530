"""`explore init` writes every study key the loader knows, with its default.

The reference is explore/study.py itself, read independently of the starter:
the sections are the dataclass fields of ``Study``, their keys the fields of
each settings dataclass, and the defaults those dataclasses' own. A key added
to the study without a line in ``explore.starter`` fails here.
"""

from __future__ import annotations

import dataclasses
import re
from typing import get_type_hints

import pytest

from explore import study as study_mod
from explore.starter import write_starter_study


@pytest.fixture()
def written(tmp_path):
    photos = tmp_path / "photos"
    for brand, source in (("Alpha", "consumer"), ("Beta", "owned")):
        (photos / brand / source).mkdir(parents=True)
    path = write_starter_study(photos)
    return path, path.read_text(encoding="utf-8")


def _keys_by_section(text: str) -> dict[str, set[str]]:
    """{section: keys written, set or commented out} from the TOML text ("" = top level)."""
    found: dict[str, set[str]] = {"": set()}
    section = ""
    for line in text.splitlines():
        header = re.match(r"^\[\[?([A-Za-z_]+)\]\]?", line)
        if header:
            section = header.group(1)
            found.setdefault(section, set())
            continue
        key = re.match(r"^(?:# )?([a-z_]+) = ", line)
        if key:
            found[section].add(key.group(1))
    return found


def _sections() -> dict[str, type]:
    """Study fields that are settings tables, by their study-file section name."""
    hints = get_type_hints(study_mod.Study)
    return {name: hint for name, hint in hints.items() if dataclasses.is_dataclass(hint)}


def test_every_study_key_is_written(written):
    _, text = written
    keys = _keys_by_section(text)
    top = {k for k in study_mod._TOP_LEVEL_KEYS}
    tables = set(_sections()) | {"brands", "attribute"}
    assert top - tables <= keys[""], "top-level keys missing"
    assert tables <= set(keys), f"sections missing: {tables - set(keys)}"
    for section, cls in _sections().items():
        missing = {f.name for f in dataclasses.fields(cls)} - keys[section]
        assert not missing, f"[{section}] keys missing from explore init: {sorted(missing)}"
    attribute_keys = {f.name for f in dataclasses.fields(study_mod.Attribute)}
    assert attribute_keys <= keys["attribute"]


def test_written_values_are_the_loaders_defaults(written):
    path, _ = written
    study = study_mod.load_study(path)
    for section, cls in _sections().items():
        loaded, default = getattr(study, section), cls()
        for field in dataclasses.fields(cls):
            if (section, field.name) == ("images", "root"):
                assert loaded.root == path.parent.resolve()
                continue
            assert getattr(loaded, field.name) == getattr(default, field.name), f"{section}.{field.name}"
    assert study.seed == 0 and len(study.attributes) == 5


def test_each_commented_example_loads_when_switched_on(written):
    path, text = written
    commented = [line for line in text.splitlines() if re.match(r"^# [a-z_]+ = ", line)]
    assert len(commented) >= 8  # weights, address, the three automatic context sizes, survey, labels, ...
    for line in commented:
        switched = text.replace(line, line[2:], 1)
        path.write_text(switched, encoding="utf-8")
        study_mod.load_study(path)  # raises StudyError naming the key if an example is invalid
