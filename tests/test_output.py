"""The output folder holds one complete run, whatever happens (real processes, no mocks).

The scenarios are in tests/fault_kit.py (also printed as a table by
tests/fault_table.py). Each starts ``explore`` as its own process on a tiny
generated study with the bundled encoder.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pandas as pd
import pytest

import fault_kit as kit

sys.path.insert(0, str(kit.REPO))


@pytest.fixture(scope="module")
def complete(tmp_path_factory):
    """A study with one complete run whose second run was refused while the first was paused."""
    work = tmp_path_factory.mktemp("complete")
    study = kit.make_tiny_study(work)
    first = kit.run("run", study, cwd=work)
    assert first.returncode == 0, first.stdout + first.stderr
    return study, work / "out"


def test_two_runs_at_once_the_second_is_refused_before_writing(complete):
    study, out = complete
    outcome = kit.concurrent_runs(study, out)
    assert outcome.status == 2
    lines = outcome.message.split(" | ")
    assert len(lines) == 1 and lines[0].startswith("explore: error: ")
    assert "in use by another explore run (process" in lines[0] and "kill " in lines[0]
    assert "Traceback" not in outcome.message
    assert outcome.intact  # the refused run changed nothing in the folder
    assert outcome.seconds < 10
    assert outcome.one_run == "" and outcome.leftovers == []


@pytest.mark.parametrize("boundary", ["collect", "embed", "attributes", "report"])
def test_kill_at_a_stage_boundary_leaves_the_previous_run(complete, boundary):
    study, out = complete
    previous = kit.run_id(out)
    outcome = kit.kill_at(study, out, boundary)
    assert outcome.intact, "a killed run changed the published results"
    assert outcome.one_run == ""
    assert kit.run_id(out) == previous
    # The next command says what happened and cleans up after the killed run.
    assert "was stopped before it finished" in outcome.next_note
    assert "did not finish; its partial outputs were removed" in outcome.next_note
    assert outcome.leftovers == []


def test_kill_while_publishing_is_completed_by_the_next_command(tmp_path):
    """A process killed half way through moving a staged run into place (a small script, no model)."""
    out = tmp_path / "out"
    script = f"""
import sys; sys.path.insert(0, {str(kit.REPO)!r})
import json, pandas as pd
from pathlib import Path
from explore.output import OutputLock, Staging, write_tables
out = Path({str(out)!r})
with OutputLock(out, "run") as lock:
    staging = Staging(out, lock.run_id)
    folder = staging.create()
    names = write_tables(folder, {{f"t{{i}}": pd.DataFrame({{"x": [i]}}) for i in range(6)}})
    (folder / "run.json").write_text(json.dumps({{"run_id": lock.run_id, "tables": names}}))
    (folder / "report.html").write_text('<meta name="explore-run-id" content="' + lock.run_id + '">')
    staging.publish()
"""
    first = subprocess.run([sys.executable, "-c", script], env=kit.env(), capture_output=True, text=True)
    assert first.returncode == 0, first.stderr
    first_id = kit.run_id(out)
    proc = subprocess.Popen([sys.executable, "-c", script], env=kit.env("publish"), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    kit.wait_stopped(proc)
    kit.kill9(proc)
    assert (out / ".publishing").is_file()
    from explore.output import OutputLock, check_one_run

    with OutputLock(out, "report") as lock:  # what every command does first
        notes = lock.notes
    assert any("the move has now been completed" in n for n in notes)
    assert any("was stopped before it finished" in n for n in notes)
    check_one_run(out)
    assert kit.run_id(out) != first_id
    assert kit.one_run(out) == ""
    assert kit.leftovers(out) == []


def test_report_refuses_tables_of_different_runs(complete, tmp_path):
    study, out = complete
    copy = kit.copy_study(study.parent, tmp_path / "mixed")
    from explore.output import write_tables

    write_tables(copy.parent / "out", {"attribute_definitions": pd.DataFrame({"attribute": ["x"]})},
                 run_id="20000101T000000Z-000000")
    done = kit.run("report", copy, cwd=copy.parent)
    assert done.returncode == 2
    assert "attribute_definitions.parquet: written by run 20000101T000000Z-000000" in done.stderr
    assert "mixes results of different runs" in done.stderr and "Traceback" not in done.stderr


@pytest.mark.parametrize("command", ["report", "check"])
def test_report_and_check_are_refused_while_a_run_holds_the_folder(complete, command):
    study, out = complete
    labels = study.parent / "labels.csv"
    labels.write_text("image,attribute,label\nAlpha/consumer/0.jpg,sunny,1\nBeta/owned/1.jpg,sunny,0\n",
                      encoding="utf-8")
    args = ("report", study) if command == "report" else ("check", study, "--labels", labels)
    outcome = kit.concurrent_runs(study, out, *args, name=f"{command} during a run")
    assert outcome.status == 2, outcome.message
    assert outcome.message.count("explore: error:") == 1 and "Traceback" not in outcome.message
    assert "in use by another explore run (process" in outcome.message
    assert outcome.intact and outcome.leftovers == [] and outcome.one_run == ""  # the run then completed alone


def test_output_path_that_is_a_file(complete, tmp_path):
    study, _ = complete
    outcome = kit.output_is_file(tmp_path, study.parent)
    assert outcome.status == 2 and "Traceback" not in outcome.message
    assert outcome.message.count("explore: error:") == 1
    assert "key 'output'" in outcome.message and "is a file" in outcome.message
    assert outcome.intact


@pytest.mark.parametrize(
    "line, expected",
    [
        ("[report]\nthumbnail_px = 5", "key 'report.thumbnail_px' is 5; expected a size between 16 and 512"),
        ("[report]\nmax_thumbnails = -1", "key 'report.max_thumbnails' is -1; expected 0 or more"),
        ('[contexts]\nvocabulary = "nope.txt"', "key 'contexts.vocabulary': vocabulary file"),
    ],
)
def test_bad_settings_fail_before_collect(complete, tmp_path, line, expected):
    study, _ = complete
    outcome = kit.bad_setting(tmp_path, study.parent, line, "bad setting")
    assert outcome.status == 2 and outcome.message.count("explore: error:") == 1
    assert expected in outcome.message and "study.toml" in outcome.message
    # refused before collect: no stage was even imported, let alone a model (the time this
    # takes is printed by benchmarks/preflight.py, not asserted here)
    assert "explore.collect" not in outcome.imported and "torch" not in outcome.imported
    assert "explore.study" in outcome.imported  # the import list was read
    assert outcome.intact


def test_labels_naming_no_attribute_of_the_study_fail_before_collect(complete, tmp_path):
    study, _ = complete
    copy = kit.copy_study(study.parent, tmp_path / "labels")
    (copy.parent / "labels.csv").write_text("image,attribute,label\nx.jpg,sunnny,1\ny.jpg,indoors,0\n",
                                            encoding="utf-8")
    for args in (("run", copy, "--labels", copy.parent / "labels.csv"),
                 ("check", copy, "--labels", copy.parent / "labels.csv")):
        outcome = kit.command_fault("labels of another study", copy, copy.parent / "out", *args)
        assert outcome.status == 2, outcome.message
        assert outcome.message.count("explore: error:") == 1 and "Traceback" not in outcome.message
        assert "no label names an attribute of the study" in outcome.message
        assert "'sunnny'" in outcome.message and "'sunny'" in outcome.message  # what it has, what the study has
        assert "explore.collect" not in outcome.imported and "torch" not in outcome.imported
        assert outcome.intact


needs_mount = pytest.mark.skipif(bool(kit.can_mount()), reason=kit.can_mount() or "mounts work")


@needs_mount
def test_read_only_output_folder(complete, tmp_path):
    study, _ = complete
    outcome = kit.readonly_output(tmp_path, study.parent)
    assert outcome.status == 2, outcome.message
    assert outcome.message.count("explore: error:") == 1 and "Traceback" not in outcome.message
    assert "Read-only file system" in outcome.message and "/out/lock" in outcome.message
    assert outcome.intact


@needs_mount
def test_read_only_cache_folder(complete, tmp_path):
    study, _ = complete
    outcome = kit.readonly_cache(tmp_path, study.parent)
    assert outcome.status == 2, outcome.message
    assert outcome.message.count("explore: error:") == 1 and "Traceback" not in outcome.message
    assert "/out/cache/" in outcome.message and "Read-only file system" in outcome.message
    assert outcome.intact and outcome.leftovers == []
    lock = json.loads((tmp_path / "rocache" / "out" / "lock").read_text())
    assert lock["state"] == "failed"  # the next command says so


@needs_mount
def test_full_disk(complete, tmp_path):
    study, _ = complete
    outcome = kit.full_disk(tmp_path, study.parent)
    assert outcome.status == 2, outcome.message
    assert outcome.message.count("explore: error:") == 1 and "Traceback" not in outcome.message
    assert "No space left on device" in outcome.message and "/full/out/" in outcome.message  # names the file
    assert outcome.intact and outcome.leftovers == []
    assert outcome.one_run == "", outcome.one_run  # after freeing space the next run completes


def test_os_error_line_names_the_path():
    from explore.cli import os_error_line

    line = os_error_line(OSError(28, os.strerror(28), "/x/y.csv"))
    assert line.startswith("/x/y.csv: No space left on device")
    assert os_error_line(FileNotFoundError("/x: labels file not found")) == "/x: labels file not found"


# --- the smaller faults --------------------------------------------------------------


def test_csv_cells_that_a_spreadsheet_would_run_are_guarded(tmp_path):
    """OWASP "CSV Injection": text starting with = + - @ tab CR gets a leading apostrophe."""
    from explore.output import write_tables

    table = pd.DataFrame({
        "brand": ['=HYPERLINK("http://x","y")', "+cmd", "@SUM(A1)", "\tx", "Plain", "-3"],
        "score": [-1.5, 2.0, -3.0, 4.0, 5.0, 6.0],
    })
    write_tables(tmp_path, {"t": table})
    back = pd.read_csv(tmp_path / "t.csv", dtype={"brand": str})
    assert back["brand"].tolist() == ['\'=HYPERLINK("http://x","y")', "'+cmd", "'@SUM(A1)", "'\tx", "Plain", "-3"]
    assert back["score"].tolist() == [-1.5, 2.0, -3.0, 4.0, 5.0, 6.0]  # numbers stay numbers
    assert pd.read_parquet(tmp_path / "t.parquet")["brand"].tolist() == table["brand"].tolist()  # exact


def test_starter_file_and_terminal_with_control_and_bidi_characters(tmp_path):
    from explore.study import load_study

    photos = tmp_path / "photos"
    names = ["Esc\x1b[31mape", "Left\u202eright", "Plain"]
    for name in names:
        (photos / name / "consumer").mkdir(parents=True)
    done = subprocess.run(kit.explore_args("init", photos), cwd=tmp_path, env=kit.env(), capture_output=True,
                          text=True)
    assert done.returncode == 0, done.stderr
    assert "\x1b" not in done.stdout and "\u202e" not in done.stdout
    assert "Esc[U+001B][31mape" in done.stdout and "Left[U+202E]right" in done.stdout
    text = (photos / "study.toml").read_text(encoding="utf-8")
    assert "\x1b" not in text and "\u202e" not in text
    study = load_study(photos / "study.toml")  # the run accepts it, with the exact folder names
    assert sorted(study.brands) == sorted(names)


def test_report_shows_names_with_bidi_characters_made_visible():
    from explore.report.data import shown_names

    table = pd.DataFrame({"brand": ["ok", "gnp\u202eexe"], "n": [1, 2], "path": ["/a\u202eb", "/c"]})
    shown = shown_names(table.copy())
    assert shown["brand"].tolist() == ["ok", "gnp[U+202E]exe"]
    assert shown["path"].tolist() == ["/a\u202eb", "/c"]  # thumbnails still read the real file


def test_thumbnails_of_16_bit_greyscale_match_what_the_model_sees(tmp_path):
    """A 16-bit PNG at 32768 of 65535 is mid-grey: 32768 * 255 / 65535 = 127.5 (independent arithmetic)."""
    import io

    import numpy as np
    from PIL import Image

    from explore.collect import open_rgb
    from explore.report.thumbnails import make_thumbnail

    path = tmp_path / "grey16.png"
    Image.fromarray(np.full((64, 64), 32768, dtype=np.uint16)).save(path)
    assert Image.open(path).mode.startswith("I;16") or Image.open(path).mode == "I"
    thumb = np.asarray(Image.open(io.BytesIO(make_thumbnail(path, 32))).convert("L"), dtype=float)
    model = np.asarray(open_rgb(path).convert("L"), dtype=float)
    assert abs(thumb.mean() - 127.5) < 2 and abs(model.mean() - 127.5) < 1


def test_an_output_folder_inside_the_images_root_is_not_collected(tmp_path):
    from explore.collect import collect_images

    study = kit.make_tiny_study(tmp_path, per_cell=1)
    results = tmp_path / "photos" / "results"
    results.mkdir()
    (results / "images.parquet").write_bytes(b"x")
    (results / "cache").mkdir()
    (results / "cache" / "lock").write_text("")
    assert (collect_images(root=tmp_path / "photos", progress=False)["status"] == "misplaced").sum() == 2
    table = collect_images(root=tmp_path / "photos", progress=False, exclude=(results,))
    assert len(table) == 4 and set(table["status"]) == {"ok"}
    from explore.study import load_study

    study.write_text(study.read_text().replace('output = "out"', 'output = "photos/results"'))
    from explore.collect import collect_study_images

    assert len(collect_study_images(load_study(study), progress=False)) == 4


def test_labels_headers_are_case_insensitive(tmp_path):
    from explore.run import read_labels_file

    path = tmp_path / "labels.csv"
    path.write_text("Image, ATTRIBUTE ,Label\na.jpg,sunny,1\n", encoding="utf-8")
    assert list(read_labels_file(path).columns) == ["image", "attribute", "label"]


def test_a_repaired_shard_is_recorded_and_an_image_changed_mid_run_is_skipped(complete, tmp_path):
    """One real run: a damaged cache shard, and a photo rewritten between collect and embed."""
    import signal

    from PIL import Image

    study, _ = complete
    copy = kit.copy_study(study.parent, tmp_path / "repair")
    shards = sorted((copy.parent / "out" / "cache").glob("bundled-*/shard-*.npz"))
    assert shards
    shards[0].write_bytes(b"not an npz file")
    proc = kit.start("run", copy, cwd=copy.parent, pause="collect")
    kit.wait_stopped(proc)
    Image.new("RGB", (90, 70), (1, 2, 3)).save(copy.parent / "photos" / "Beta" / "owned" / "1.jpg")
    os.kill(proc.pid, signal.SIGCONT)
    stdout, stderr = proc.communicate(timeout=600)
    assert proc.returncode == 0, stderr
    assert f"embed: cache shard {shards[0].name} could not be read" in stdout
    assert "embed: Beta/owned/1.jpg: skipped, the file's content changed since it was collected" in stdout
    out = copy.parent / "out"
    notes = json.loads((out / "run.json").read_text())["notes"]
    assert any(n.startswith(f"embed: cache shard {shards[0].name}") for n in notes)
    images = pd.read_parquet(out / "images.parquet").set_index("relpath")
    assert images.loc["Beta/owned/1.jpg", "status"] == "changed"
    assert (images["status"] == "ok").sum() == 7
    assert "Beta/owned/1.jpg" in set(pd.read_parquet(out / "skipped.parquet")["relpath"])
    assert kit.one_run(out) == ""
