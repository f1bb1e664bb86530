"""The output folder: one command owns it, and a run's results appear all at once.

Layout of a study's output folder::

    OUT/
      lock                  held (flock) by the command using the folder; JSON with
                            the holder's process id, host, command, start time, state
      run.json, NAME.csv, NAME.parquet, report.html
                            the current results: all from one complete run
      cache/                embedding cache (its own lock) and thumbnails
      .staging-<run id>/    a run in progress: its tables, run.json and report
                            (``cache`` inside is a link to ``../cache``)
      .publishing           journal while a finished run is moved into place

Why a reader never sees a mixture: a run writes everything into its staging
folder. Only when every stage has succeeded does it write the journal
(atomically) and move each file into ``OUT`` (each move an atomic rename),
``run.json`` last, then remove the previous run's tables that this run did not
write. If it is killed while moving, the next command that takes the lock
finishes the move from the journal (the staging folder is complete), so the
folder always ends as exactly one run. A run that fails or is killed before
that point leaves the previous results untouched; its staging folder is
removed (at once, or by the next command), and the next command says so.

Every parquet table carries its run id in the file's metadata
(``explore_run_id``); ``check_one_run`` refuses a folder whose tables do not
all carry the id in ``run.json``.

Why two commands cannot collide: the lock is an exclusive non-blocking
``flock``, which the kernel drops when its holder dies (even by ``kill -9``),
so a stale lock never blocks anyone; the JSON inside only serves the messages.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import signal
import socket
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from explore.cache import _try_lock, _unlock  # the one non-blocking file lock, shared with the cache

LOCK_FILE = "lock"
JOURNAL = ".publishing"
STAGING_PREFIX = ".staging-"
RUN_ID_FILE = ".run_id"
RUN_FILE = "run.json"
REPORT_FILE = "report.html"
#: Parquet metadata key holding the id of the run that wrote a table.
STAMP_KEY = b"explore_run_id"
#: Names of stage boundaries at which a run stops itself (SIGSTOP), comma
#: separated; used by tests to kill or resume a run at an exact point.
PAUSE_VARIABLE = "EXPLORE_PAUSE_AT"

#: First characters that make a spreadsheet read a cell as a formula (OWASP,
#: "CSV Injection"); such text cells are written with a leading apostrophe.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


class OutputError(RuntimeError):
    """The output folder cannot be used as asked; the message says why and what to do."""


class OutputBusy(OutputError):
    """Another explore command holds the output folder's lock."""


def new_run_id() -> str:
    """A sortable, unique run id: UTC time plus 6 random hex digits."""
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime()) + "-" + secrets.token_hex(3)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def pause_point(name: str) -> None:
    """Stop this process (SIGSTOP) at boundary ``name`` when ``EXPLORE_PAUSE_AT`` names it.

    A test hook: the test waits for the stop, then kills the process or lets it
    continue (SIGCONT). Does nothing unless the variable is set.
    """
    wanted = os.environ.get(PAUSE_VARIABLE, "")
    if wanted and name in {w.strip() for w in wanted.split(",")} and hasattr(signal, "SIGSTOP"):
        print(f"explore: paused at {name} (process {os.getpid()})", file=sys.stderr, flush=True)
        os.kill(os.getpid(), signal.SIGSTOP)


# --------------------------------------------------------------------------
# The lock


class OutputLock:
    """Exclusive use of an output folder by one command; use as a context manager.

    ``notes`` says what the lock found on taking over: a previous command that
    was killed or failed, a publish it finished, staging folders it removed.
    Call ``failed(message)`` before leaving on an error, so the next command
    can say what happened.
    """

    def __init__(self, folder: str | Path, command: str, run_id: str | None = None):
        self.folder = Path(folder)
        self.command = command
        self.run_id = run_id or new_run_id()
        self.notes: list[str] = []
        self._fd: int | None = None
        self._state = "done"
        self._error = ""

    def __enter__(self) -> "OutputLock":
        self.acquire()
        return self

    def __exit__(self, kind, value, tb) -> bool:
        if kind is not None and self._state == "done":
            self.failed(_one_line(value) or kind.__name__)
        self.release()
        return False

    def failed(self, message: str) -> None:
        self._state, self._error = "failed", message

    def acquire(self) -> None:
        folder = self.folder
        if folder.exists() and not folder.is_dir():
            raise OutputError(
                f"{folder}: the output path is a file, not a folder; set 'output' in the study "
                "file (or --out) to a folder, or move the file away"
            )
        folder.mkdir(parents=True, exist_ok=True)
        fd = os.open(folder / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            _try_lock(fd)
        except OSError:
            holder = _read_json_fd(fd)
            os.close(fd)
            raise OutputBusy(f"{folder}: {_busy_message(holder)}") from None
        previous = _read_json_fd(fd)
        self._fd = fd
        try:
            _write_json_fd(fd, self._record("running"))
        except BaseException:
            self.release()
            raise
        self.notes += _previous_note(previous)
        self.notes += recover(folder)

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            _write_json_fd(self._fd, self._record(self._state))
        except OSError:  # a full disk must not hide the real error
            pass
        try:
            _unlock(self._fd)
        finally:
            os.close(self._fd)
            self._fd = None

    def _record(self, state: str) -> dict:
        record = {
            "pid": os.getpid(),
            "host": socket.gethostname(),
            "command": self.command,
            "run_id": self.run_id,
            "started_at": getattr(self, "_started", None) or _now(),
            "state": state,
        }
        self._started = record["started_at"]
        if state == "failed":
            record["error"] = self._error
        return record


def _busy_message(holder: dict) -> str:
    if not holder:
        return (
            "in use by another explore command; wait for it to finish, "
            "or use a different output folder"
        )
    pid = holder.get("pid", "?")
    here = holder.get("host") == socket.gethostname()
    where = "" if here else f" on host {holder.get('host', '?')}"
    return (
        f"in use by another explore {holder.get('command', 'command')} (process {pid}{where}, "
        f"started {holder.get('started_at', '?')}); wait for it to finish, stop it "
        f"(kill {pid}{where}), or use a different output folder"
    )


def _previous_note(previous: dict) -> list[str]:
    """What the record left by the last holder says, when it did not end well."""
    state = previous.get("state")
    who = (
        f"the previous {previous.get('command', 'command')} (run {previous.get('run_id', '?')}, "
        f"process {previous.get('pid', '?')}, started {previous.get('started_at', '?')})"
    )
    if state == "running":  # it held the flock, so it died without releasing it
        return [f"output: {who} was stopped before it finished (its lock was taken over)"]
    if state == "failed":
        return [f"output: {who} failed: {previous.get('error', 'no reason recorded')}"]
    return []


# --------------------------------------------------------------------------
# Staging and publishing


class Staging:
    """A fresh folder inside ``out`` that a command writes its outputs into.

    ``cache`` inside it links to ``out/cache``, so code that uses
    ``FOLDER / "cache"`` keeps using the one cache. Call ``publish`` when every
    output is written; ``discard`` on failure.
    """

    def __init__(self, out: str | Path, run_id: str):
        self.out = Path(out)
        self.run_id = run_id
        self.folder = self.out / f"{STAGING_PREFIX}{run_id}"

    def create(self) -> Path:
        """Make the staging folder and probe that a real file can be written there."""
        (self.out / "cache").mkdir(exist_ok=True)
        self.folder.mkdir()
        _write_file(self.folder / RUN_ID_FILE, self.run_id.encode("ascii"))
        try:
            (self.folder / "cache").symlink_to(Path("..") / "cache", target_is_directory=True)
        except OSError:  # no symlinks here (e.g. Windows without the privilege): a private cache folder
            pass
        return self.folder

    def discard(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)

    def publish(self, remove_previous_tables: bool = True) -> None:
        """Make everything in the staging folder current in ``out``, in one step.

        ``remove_previous_tables``: also remove the tables listed by the
        previous ``run.json`` that this staging folder does not replace (a run
        does this; ``check`` and ``embed`` add tables and keep the rest).
        """
        names = sorted(p.name for p in self.folder.iterdir() if p.name not in ("cache", RUN_ID_FILE))
        for name in names:
            _fsync_path(self.folder / name)
        _fsync_path(self.folder)
        remove: list[str] = []
        if remove_previous_tables:
            previous = _read_run(self.out)
            for table in previous.get("tables") or []:
                for suffix in (".csv", ".parquet"):
                    if f"{table}{suffix}" not in names:
                        remove.append(f"{table}{suffix}")
            if REPORT_FILE not in names:
                remove.append(REPORT_FILE)
        journal = {"staging": self.folder.name, "run_id": self.run_id, "remove": remove}
        _write_file(self.out / JOURNAL, json.dumps(journal).encode("utf-8"))
        _finish_publish(self.out, journal)


def _finish_publish(out: Path, journal: dict) -> None:
    """Move the staged files into place (idempotent), remove stale ones, drop the journal."""
    staging = out / journal["staging"]
    if staging.is_dir():
        names = [p.name for p in staging.iterdir() if p.name not in ("cache", RUN_ID_FILE)]
        # Tables first, then the report, then run.json: the record comes last.
        names.sort(key=lambda n: (n == RUN_FILE, n == REPORT_FILE, n))
        for number, name in enumerate(names):
            if number == len(names) // 2:
                pause_point("publish")
            os.replace(staging / name, out / name)
    for name in journal.get("remove") or []:
        (out / name).unlink(missing_ok=True)
    _fsync_path(out)
    shutil.rmtree(staging, ignore_errors=True)
    (out / JOURNAL).unlink(missing_ok=True)


def recover(out: Path) -> list[str]:
    """Finish an interrupted publish and remove abandoned staging folders; returns notes.

    Call only while holding the folder's lock.
    """
    notes = []
    journal_path = out / JOURNAL
    for leftover in [*out.glob(".*.tmp"), out / f"{REPORT_FILE}.tmp"]:
        leftover.unlink(missing_ok=True)  # temporary files of a command that was killed
    if journal_path.is_file():
        journal = json.loads(journal_path.read_text(encoding="utf-8"))
        _finish_publish(out, journal)
        notes.append(
            f"output: run {journal.get('run_id', '?')} was interrupted while its results were "
            "moved into place; the move has now been completed"
        )
    current = _read_run(out).get("run_id") or "none"
    for staging in sorted(out.glob(f"{STAGING_PREFIX}*")):
        shutil.rmtree(staging, ignore_errors=True)
        notes.append(
            f"output: run {staging.name[len(STAGING_PREFIX):]} did not finish; its partial outputs "
            f"were removed and the results in {out} are unchanged (run {current})"
        )
    return notes


def check_one_run(folder: str | Path) -> None:
    """Refuse an output folder whose tables were not all written by the run in ``run.json``.

    Every table ``run.json`` lists must exist as parquet and carry that run's
    id. Folders written before run ids existed (no ``run_id`` in run.json) pass.

    Raises
    ------
    OutputError naming the first table that does not belong.
    """
    folder = Path(folder)
    run = _read_run(folder)
    run_id = run.get("run_id")
    if not run_id:
        return
    for table in run.get("tables") or []:
        path = folder / f"{table}.parquet"
        if not path.is_file():
            raise OutputError(
                f"{path}: missing, although run.json (run {run_id}) lists it; run the study again"
            )
        stamp = table_run_id(path)
        if stamp != run_id:
            came = f"run {stamp}" if stamp else "an unknown run"
            raise OutputError(
                f"{path}: written by {came}, but run.json is run {run_id}; the folder mixes "
                "results of different runs; run the study again (explore run STUDY)"
            )


def table_run_id(path: str | Path) -> str:
    """The run id stamped in a parquet file ('' when there is none)."""
    import pyarrow.parquet as pq

    metadata = pq.read_schema(path).metadata or {}
    return metadata.get(STAMP_KEY, b"").decode("utf-8", "replace")


# --------------------------------------------------------------------------
# Writing tables


def write_tables(folder: Path, tables: dict[str, pd.DataFrame], run_id: str | None = None) -> list[str]:
    """Write each table as NAME.csv and NAME.parquet; returns the names written.

    Each file is written under a temporary name and renamed into place, so it
    is never half-written. Parquet files carry ``run_id`` (default: the id of
    the staging folder they are written into) in their metadata. CSV text
    cells that a spreadsheet would run as a formula get a leading apostrophe
    (``formula_safe``); the parquet files keep the exact values.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if run_id is None and (folder / RUN_ID_FILE).is_file():
        run_id = (folder / RUN_ID_FILE).read_text(encoding="ascii").strip()
    written = []
    for name, table in tables.items():
        csv_path = folder / f"{name}.csv"
        with _temporary(csv_path) as tmp:
            formula_safe(table).to_csv(tmp, index=False)
        arrow = pa.Table.from_pandas(table, preserve_index=False)
        if run_id:
            arrow = arrow.replace_schema_metadata({**(arrow.schema.metadata or {}), STAMP_KEY: run_id.encode()})
        with _temporary(folder / f"{name}.parquet") as tmp:
            pq.write_table(arrow, tmp)
        written.append(name)
    return written


def formula_safe(table: pd.DataFrame) -> pd.DataFrame:
    """A copy whose text cells starting with = + - @ tab or CR begin with an apostrophe.

    Numbers stay numbers (a negative number is not text, so it is left
    alone); only object/string columns are touched. The same rule as the
    report's download buttons (OWASP, "CSV Injection").
    """
    out = None
    for column in table.columns:
        series = table[column]
        if not (pd.api.types.is_object_dtype(series) or pd.api.types.is_string_dtype(series)):
            continue
        risky = series.map(_formula_like)
        if risky.any():
            if out is None:
                out = table.copy()
            out[column] = series.where(~risky, "'" + series.astype(str))
    return table if out is None else out


def _formula_like(value) -> bool:
    """True for text a spreadsheet would evaluate: starts with = + - @ tab CR and is not a number."""
    if not isinstance(value, str) or not value.startswith(FORMULA_STARTS):
        return False
    try:
        float(value)
    except ValueError:
        return True
    return value.strip().lower().lstrip("+-") in ("nan", "inf", "infinity")


class _temporary:
    """``with _temporary(path) as tmp``: write tmp; renamed to path on success, removed on failure."""

    def __init__(self, path: Path):
        self.path = path
        self.tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")

    def __enter__(self) -> Path:
        return self.tmp

    def __exit__(self, kind, value, tb) -> bool:
        if kind is None:
            os.replace(self.tmp, self.path)
            return False
        self.tmp.unlink(missing_ok=True)
        if isinstance(value, OSError) and value.filename is None and value.errno:
            # pyarrow's write errors name no file: name the table being written
            raise OSError(value.errno, os.strerror(value.errno), str(self.path)) from value
        return False


# --------------------------------------------------------------------------
# Small helpers


def _one_line(exc) -> str:
    return " ".join(str(exc).split()) if exc is not None else ""


def _read_run(out: Path) -> dict:
    try:
        data = json.loads((Path(out) / RUN_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _read_json_fd(fd: int) -> dict:
    try:
        raw = os.pread(fd, 4096, 0).decode("utf-8", "replace").strip()
        data = json.loads(raw) if raw else {}
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _write_json_fd(fd: int, record: dict) -> None:
    os.ftruncate(fd, 0)
    os.pwrite(fd, json.dumps(record).encode("utf-8"), 0)


def _write_file(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically (temporary file, fsync, rename)."""
    with _temporary(path) as tmp:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())


def _fsync_path(path: Path) -> None:
    if os.name != "posix":
        return
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)

