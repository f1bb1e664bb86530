"""Shared pytest fixtures. Each block belongs to one stage; append, don't rewrite."""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


# --- demo run (tests/test_demo.py and the stage tests that check the demo) --------
DEMO_OUTPUT = REPO / "outputs" / "demo"


@pytest.fixture(scope="session")
def demo_run():
    """Run ``explore demo --encoder bundled`` once per session; yields outputs/demo/.

    Every output of an earlier run is removed first except the embedding cache
    (``outputs/demo/cache``), so the tables checked are the ones this run wrote
    while a warm cache keeps the session short. The run's stdout is kept in
    ``outputs/demo/demo_stdout.txt``. A lock file (``outputs/.demo.lock``) is held
    for the whole session, so two test sessions on one checkout never wipe or
    rewrite each other's demo outputs; the second waits for the first.
    """
    import fcntl

    DEMO_OUTPUT.parent.mkdir(parents=True, exist_ok=True)
    lock = open(DEMO_OUTPUT.parent / ".demo.lock", "w")
    fcntl.flock(lock, fcntl.LOCK_EX)
    try:
        if DEMO_OUTPUT.exists():
            for item in DEMO_OUTPUT.iterdir():
                if item.name == "cache":
                    continue
                if item.is_dir():
                    shutil.rmtree(item)
                else:
                    item.unlink()
        started = time.time()
        proc = subprocess.run(
            [sys.executable, "-m", "explore.cli", "--quiet", "demo", "--encoder", "bundled"],
            cwd=REPO,
            capture_output=True,
            text=True,
            timeout=1800,
        )
        if proc.returncode != 0:
            pytest.fail(
                f"explore demo exited {proc.returncode}\n--- stdout ---\n{proc.stdout}\n--- stderr ---\n{proc.stderr}"
            )
        DEMO_OUTPUT.mkdir(parents=True, exist_ok=True)
        (DEMO_OUTPUT / "demo_stdout.txt").write_text(proc.stdout, encoding="utf-8")
        print(f"explore demo: {time.time() - started:.0f} s\n{proc.stdout}")
        yield DEMO_OUTPUT
    finally:
        fcntl.flock(lock, fcntl.LOCK_UN)
        lock.close()
# --- end demo run ------------------------------------------------------------------
