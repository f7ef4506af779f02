"""Regenerate the demo's approved baseline (reports/baseline.json) with the current loopvet.

Needed when loopvet's analysis changes (``loopvet check`` then reports the shipped baseline
as "not comparable"). The approved records are taken from the baseline itself (it stores
their text), so the retuned demo record keeps showing its drift. Approver and time are
fixed, so the output is byte-for-byte reproducible:

    python3 ci/regenerate_demo_baseline.py         # from the repository root

It runs ``loopvet approve designs --by demo --accept-failing`` on those stored records in a
temporary folder with SOURCE_DATE_EPOCH set, then replaces reports/baseline.json atomically.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BASELINE = ROOT / "reports" / "baseline.json"
APPROVED_AT = "1714982400"          # 2024-05-06T08:00:00Z
APPROVED_BY = "demo"


def main() -> int:
    stored = json.loads(BASELINE.read_text(encoding="utf-8"))["designs"]
    with tempfile.TemporaryDirectory() as tmp:
        for entry in stored.values():
            target = Path(tmp) / entry["path"]
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes("\n".join(entry["record_lines"]).encode("utf-8"))
        env = {**os.environ, "SOURCE_DATE_EPOCH": APPROVED_AT,
               "PYTHONPATH": str(ROOT / "src") + os.pathsep + os.environ.get("PYTHONPATH", "")}
        done = subprocess.run([sys.executable, "-m", "loopvet", "approve", "designs", "--by",
                               APPROVED_BY, "--accept-failing"], cwd=tmp, env=env, check=False)
        if done.returncode != 0:
            return done.returncode
        fresh = Path(tmp) / "reports" / "baseline.json"
        shutil.copyfile(fresh, BASELINE.with_suffix(".json.tmp"))
        os.replace(BASELINE.with_suffix(".json.tmp"), BASELINE)
    print(f"wrote {BASELINE.relative_to(ROOT)}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
