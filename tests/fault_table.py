"""Print the fault table: each fault injected into a real ``explore`` process, the outcome, what was lost.

    .venv/bin/python tests/fault_table.py

Runs on a tiny generated study (8 photos, bundled encoder) in a temporary
folder; the scenarios are those of tests/fault_kit.py, which
tests/test_output.py asserts on. Mount-based faults (read-only and full file
systems) need root and are listed as skipped otherwise. Takes one to two
minutes on an idle 2-core machine.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import fault_kit as kit  # noqa: E402


def main() -> int:
    work = Path(tempfile.mkdtemp(prefix="explore-faults-"))
    started = time.time()
    rows = []
    try:
        study, out = kit.baseline(work / "study")
        rows.append(kit.concurrent_runs(study, out))
        for boundary in ("collect", "embed", "attributes", "report", "publish"):
            rows.append(kit.kill_at(study, out, boundary))
        rows.append(kit.output_is_file(work, study.parent))
        rows.append(kit.bad_setting(work, study.parent, "[report]\nthumbnail_px = 5", "report.thumbnail_px = 5"))
        rows.append(kit.bad_setting(work, study.parent, '[contexts]\nvocabulary = "nope.txt"',
                                    "contexts.vocabulary = nope.txt"))
        reason = kit.can_mount()
        if reason:
            for name in ("read-only output folder", "read-only cache folder", "full disk"):
                rows.append(kit.Outcome(name, message=f"skipped: {reason}"))
        else:
            rows.append(kit.readonly_output(work, study.parent))
            rows.append(kit.readonly_cache(work, study.parent))
            rows.append(kit.full_disk(work, study.parent))
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print("WORK = a temporary folder; tiny study of 8 generated photos, bundled encoder")
    print(f"{'fault':<34} {'exit':>4}  {'results':<22} outcome / what was lost")
    for row in rows:
        status = "" if row.status is None else str(row.status)
        if row.intact is None:
            results = "" if row.status != -9 else ("new run complete" if not row.one_run else "MIXED")
        else:
            results = "intact" if row.intact else "CHANGED"
            results += ", one run" if not row.one_run else ", MIXED"
            if row.leftovers:
                results += ", LEFTOVERS"
        said = (row.message or row.next_note).replace(str(work), "WORK")
        print(f"{row.fault:<34} {status:>4}  {results:<22} {said}")
        if row.lost:
            print(f"{'':<34} {'':>4}  {'':<22} lost: {row.lost.replace(str(work), 'WORK')}")
    print(f"({time.time() - started:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
