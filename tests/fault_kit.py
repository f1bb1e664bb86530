"""Real-process fault scenarios for the output folder (used by tests/test_output.py and tests/fault_table.py).

Each scenario runs the ``explore`` command line as a separate process on a tiny
generated study (8 photos, bundled encoder), injects one fault (a second run,
``kill -9`` at a stage boundary, a read-only or full file system, a file in the
way, a bad setting) and returns what happened: the exit status, the error
line, whether the previous complete results survived byte for byte, and what
was lost. Pausing at an exact point uses ``EXPLORE_PAUSE_AT`` (the run stops
itself with SIGSTOP there; ``explore.output.pause_point``).

Read-only and full file systems are real mounts (``mount -t tmpfs``, a
read-only bind mount); tests run as root, where permission bits are ignored,
so chmod would not do. Where mounting is not allowed the scenario is skipped.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
STUDY_TEXT = """name = "tiny"
output = "{output}"
[images]
root = "photos"
# plain generated shapes look like product shots to the commercial-post flag;
# the fault tests need every photo counted
commercial_posts = "keep"
[encoder]
name = "bundled"
[[attribute]]
name = "sunny"
positive = ["bright sunshine on a clear day"]
negative = ["grey overcast weather"]
[[attribute]]
name = "indoor"
positive = ["indoors in a room"]
negative = ["outdoors in nature"]
"""


def make_tiny_study(folder: Path, output: str = "out", per_cell: int = 2, brands=("Alpha", "Beta")) -> Path:
    """Two brands x two sources x ``per_cell`` generated JPEGs (seeded), a study file; returns it."""
    from PIL import Image, ImageDraw

    import random

    rng = random.Random(15)
    root = folder / "photos"
    for brand in brands:
        for source in ("consumer", "owned"):
            cell = root / brand / source
            cell.mkdir(parents=True, exist_ok=True)
            for i in range(per_cell):
                image = Image.new("RGB", (96, 80), tuple(rng.randrange(256) for _ in range(3)))
                draw = ImageDraw.Draw(image)
                x, y = rng.randrange(40), rng.randrange(30)
                draw.ellipse((x, y, x + 40, y + 40), fill=tuple(rng.randrange(256) for _ in range(3)))
                image.save(cell / f"{i}.jpg", quality=90)
    study = folder / "study.toml"
    study.write_text(STUDY_TEXT.format(output=output), encoding="utf-8")
    return study


def env(pause: str | None = None) -> dict:
    e = dict(os.environ, PYTHONPATH=str(REPO), HF_HUB_OFFLINE="1")
    e.pop("EXPLORE_PAUSE_AT", None)
    if pause:
        e["EXPLORE_PAUSE_AT"] = pause
    return e


def explore_args(*args) -> list[str]:
    return [sys.executable, "-m", "explore.cli", "--quiet", *map(str, args)]


def run(*args, cwd: Path, pause: str | None = None, timeout: float = 600,
        importtime: bool = False) -> subprocess.CompletedProcess:
    """``explore ARGS`` in a new process; with ``importtime`` Python lists every module it
    imports on stderr (``-X importtime``; ``imported`` reads them, ``error_lines`` skips them)."""
    e = env(pause)
    if importtime:
        e["PYTHONPROFILEIMPORTTIME"] = "1"
    return subprocess.run(explore_args(*args), cwd=cwd, env=e, capture_output=True, text=True, timeout=timeout)


def imported(stderr: str) -> set[str]:
    """The modules a process imported, from its ``-X importtime`` lines."""
    return {line.rsplit("|", 1)[-1].strip() for line in stderr.splitlines() if line.startswith("import time:")}


def start(*args, cwd: Path, pause: str | None = None) -> subprocess.Popen:
    return subprocess.Popen(explore_args(*args), cwd=cwd, env=env(pause), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def wait_stopped(proc: subprocess.Popen, timeout: float = 300) -> None:
    """Wait until ``proc`` has stopped itself (SIGSTOP at a pause point)."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"exited {proc.returncode} before pausing\n{out}\n{err}")
        try:
            state = Path(f"/proc/{proc.pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
        except OSError:
            state = ""
        if state == "T":
            return
        time.sleep(0.05)
    proc.kill()
    raise AssertionError("the run never reached its pause point")


def kill9(proc: subprocess.Popen) -> None:
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate()


def snapshot(out: Path) -> dict[str, str]:
    """sha256 of every result file (tables, run.json, report), leaving out the lock and the cache."""
    digests = {}
    if not out.is_dir():
        return digests
    for path in sorted(out.iterdir()):
        if path.is_file() and path.name != "lock":
            digests[path.name] = hashlib.sha256(path.read_bytes()).hexdigest()
    return digests


def leftovers(out: Path) -> list[str]:
    """Temporary files and staging folders anywhere under ``out``."""
    found = []
    for path in out.rglob("*"):
        if path.name.endswith(".tmp") or path.name.startswith(".staging-") or path.name.startswith(".write-probe"):
            found.append(str(path.relative_to(out)))
    return found


def one_run(out: Path) -> str:
    """'' when run.json, every table it lists and report.html belong to one run, else the problem."""
    sys.path.insert(0, str(REPO))
    from explore.output import OutputError, check_one_run

    try:
        check_one_run(out)
    except OutputError as exc:
        return str(exc)
    run_id = json.loads((out / "run.json").read_text())["run_id"]
    html = (out / "report.html").read_text(encoding="utf-8")
    if f'name="explore-run-id" content="{run_id}"' not in html:
        return f"report.html is not from run {run_id}"
    return ""


def run_id(out: Path) -> str:
    return json.loads((out / "run.json").read_text())["run_id"]


def error_lines(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if line.strip() and not line.startswith("import time:")]


# --------------------------------------------------------------------------
# Mounts (root only)


def can_mount() -> str:
    """'' when tmpfs mounts work here, else the reason they do not."""
    if os.name != "posix" or os.geteuid() != 0:
        return "mounting needs root"
    probe = Path(f"/tmp/explore-mount-probe-{os.getpid()}")
    probe.mkdir(exist_ok=True)
    try:
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(probe)],
                              capture_output=True, text=True)
        if done.returncode != 0:
            return f"mount -t tmpfs is not allowed here: {done.stderr.strip()}"
        subprocess.run(["umount", str(probe)], check=True)
        return ""
    finally:
        probe.rmdir()


@contextlib.contextmanager
def tmpfs(path: Path, size: str):
    path.mkdir(parents=True, exist_ok=True)
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)], check=True)
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], check=False)


def remount_readonly(path: Path, bind: bool = False) -> None:
    if bind:
        subprocess.run(["mount", "--bind", str(path), str(path)], check=True)
        subprocess.run(["mount", "-o", "remount,bind,ro", str(path)], check=True)
    else:
        subprocess.run(["mount", "-o", "remount,ro", str(path)], check=True)


def fill(folder: Path, leave: int) -> None:
    """Fill the file system holding ``folder`` until about ``leave`` bytes are free."""
    filler = folder / "filler.bin"
    with open(filler, "wb") as f:
        try:
            while True:
                f.write(b"\0" * 65536)
                f.flush()
        except OSError:
            pass
    with open(filler, "r+b") as f:
        f.truncate(max(0, filler.stat().st_size - leave))


# --------------------------------------------------------------------------
# Scenarios


@dataclass
class Outcome:
    fault: str
    status: int | None = None
    message: str = ""
    intact: bool | None = None  # previous complete results byte-identical
    imported: set = field(default_factory=set)  # modules the command imported (command_fault only)
    one_run: str = ""  # '' when the folder is one complete run
    leftovers: list[str] = field(default_factory=list)
    next_note: str = ""  # what the next command said about it
    seconds: float = 0.0
    lost: str = ""


def baseline(work: Path) -> tuple[Path, Path]:
    """A tiny study with one complete run (warm cache); returns (study file, output folder)."""
    work.mkdir(parents=True, exist_ok=True)
    study = make_tiny_study(work)
    done = run("run", study, cwd=work)
    assert done.returncode == 0, done.stdout + done.stderr
    return study, work / "out"


def copy_study(source: Path, target: Path, with_cache: bool = True) -> Path:
    """A copy of a study folder (photos, study file, outputs) so a fault cannot spoil the original."""
    target.mkdir(parents=True, exist_ok=True)
    for item in source.iterdir():
        if item.is_dir():
            shutil.copytree(item, target / item.name, symlinks=True, dirs_exist_ok=True,
                            ignore=None if with_cache else shutil.ignore_patterns("bundled-*"))
        else:
            shutil.copy2(item, target / item.name)
    return target / "study.toml"


def concurrent_runs(study: Path, out: Path, *second_args, name: str = "two runs on one study at once") -> Outcome:
    """A run paused after collect; a second command (default: another run) on the same study
    must be refused before writing."""
    outcome = Outcome(name)
    before = snapshot(out)
    first = start("run", study, cwd=study.parent, pause="collect")
    wait_stopped(first)
    started = time.time()
    second = run(*(second_args or ("run", study)), cwd=study.parent)
    outcome.seconds = time.time() - started
    outcome.status = second.returncode
    outcome.message = " | ".join(error_lines(second.stderr))
    outcome.intact = snapshot(out) == before
    os.kill(first.pid, signal.SIGCONT)
    first_out, first_err = first.communicate(timeout=600)
    assert first.returncode == 0, first_out + first_err
    outcome.one_run = one_run(out)
    outcome.leftovers = leftovers(out)
    outcome.lost = "nothing: the second run wrote nothing; the first completed"
    return outcome


def kill_at(study: Path, out: Path, boundary: str) -> Outcome:
    """``kill -9`` a run paused at ``boundary``; then ``explore report`` on the folder."""
    outcome = Outcome(f"kill -9 at {boundary}")
    before = snapshot(out)
    previous = run_id(out)
    proc = start("run", study, cwd=study.parent, pause=boundary)
    wait_stopped(proc)
    kill9(proc)
    outcome.status = -9
    after = snapshot(out)
    outcome.intact = after == before
    outcome.one_run = "" if boundary == "publish" else one_run(out)
    report = run("report", study, cwd=study.parent)
    assert report.returncode == 0, report.stdout + report.stderr
    outcome.next_note = " | ".join(line for line in report.stdout.splitlines() if line.startswith("output:"))
    if boundary == "publish":  # half moved: the report command finishes the move from the journal
        outcome.intact = None
        outcome.one_run = one_run(out)
        outcome.lost = f"nothing: run {run_id(out)} completed by the next command (was {previous})"
    else:
        outcome.lost = f"the killed run's work (cache vectors kept); results still run {previous}"
    outcome.leftovers = leftovers(out)
    return outcome


def command_fault(name: str, study: Path, out: Path, *args) -> Outcome:
    outcome = Outcome(name)
    before = snapshot(out)
    started = time.time()
    done = run(*(args or ("run", study)), cwd=study.parent, importtime=True)
    outcome.seconds = time.time() - started
    outcome.status = done.returncode
    outcome.message = " | ".join(error_lines(done.stderr))
    outcome.imported = imported(done.stderr)
    outcome.intact = snapshot(out) == before
    outcome.leftovers = leftovers(out) if out.is_dir() else []
    outcome.one_run = one_run(out) if (out / "run.json").is_file() else ""
    outcome.lost = "nothing" if outcome.intact else "previous results changed"
    return outcome


def readonly_output(work: Path, source: Path) -> Outcome:
    """The whole output folder on a read-only file system."""
    mount = work / "ro"
    with tmpfs(mount, "16m"):
        study = copy_study(source, mount)
        remount_readonly(mount)
        return command_fault("read-only output folder", study, mount / "out")


def output_is_file(work: Path, source: Path) -> Outcome:
    study = copy_study(source, work / "file")
    shutil.rmtree(work / "file" / "out")
    (work / "file" / "out").write_text("not a folder", encoding="utf-8")
    outcome = command_fault("output path is a file", study, work / "file" / "none")
    outcome.intact = (work / "file" / "out").read_text(encoding="utf-8") == "not a folder"
    return outcome


def readonly_cache(work: Path, source: Path) -> Outcome:
    study = copy_study(source, work / "rocache")
    cache = work / "rocache" / "out" / "cache"
    remount_readonly(cache, bind=True)
    try:
        return command_fault("read-only cache folder", study, work / "rocache" / "out")
    finally:
        subprocess.run(["umount", "-l", str(cache)], check=False)


def full_disk(work: Path, source: Path, leave: int = 24 * 1024) -> Outcome:
    """A tmpfs with the previous results and a cold cache, filled to ``leave`` bytes free."""
    mount = work / "full"
    with tmpfs(mount, "24m"):
        study = copy_study(source, mount, with_cache=False)
        fill(mount, leave)
        outcome = command_fault("full disk (tmpfs, cold cache)", study, mount / "out")
        (mount / "filler.bin").unlink()
        again = run("run", study, cwd=mount)  # with space again, the same study runs to the end
        outcome.lost = (
            f"nothing: previous results intact; after freeing space the next run exits {again.returncode}"
        )
        outcome.one_run = one_run(mount / "out") if again.returncode == 0 else again.stderr
        return outcome


def bad_setting(work: Path, source: Path, key_line: str, name: str) -> Outcome:
    study = copy_study(source, work / name.replace(" ", "_"))
    study.write_text(study.read_text(encoding="utf-8") + key_line + "\n", encoding="utf-8")
    return command_fault(name, study, study.parent / "out")
