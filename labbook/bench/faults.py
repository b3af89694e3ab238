"""``make faults``: the fault scenarios of tests/faults, run for real, and their table.

Each scenario is an automated test (pytest) that injects the fault and checks what survived:
Redis stopped during a batch ingest, a worker killed with SIGKILL mid-task, PostgreSQL
connections cut under load, the PostgreSQL server restarted and crashed under load, the files
volume full, the logger client cut off for an hour. They need PostgreSQL and Redis
(redis-server is started privately on a free port, and the restarted PostgreSQL is a private
cluster made with initdb by tests/faults/pgcluster.py; the machine's Redis and PostgreSQL
cluster are never stopped). This prints one line a scenario: fault, tries, survived, lost,
the verdict of its test (when the scenario names its test) and its figures; known bugs (tests
marked xfail with the proposed fix) are listed apart. The table is also written to
var/bench/faults.json. Arguments go to pytest: ``-k postgres_restart`` runs one scenario.

``DATABASE_URL`` is used when it points at PostgreSQL; otherwise
``FAULTS_DATABASE_URL`` (default ``postgresql://postgres@127.0.0.1:5432/labbook_faults``;
pytest-django makes and drops ``test_labbook_faults``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import xml.etree.ElementTree as ET
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _outcomes(junit: Path) -> dict[str, str]:
    """test name -> passed / failed / skipped / xfailed, from pytest's JUnit XML."""
    outcomes = {}
    # S314: the XML is the one pytest just wrote in our own temporary directory.
    for case in ET.parse(junit).getroot().iter("testcase"):  # noqa: S314
        name = case.get("name", "")
        state = "passed"
        for child in case:
            if child.tag in ("failure", "error"):
                state = "failed"
            elif child.tag == "skipped":
                xfail = (child.get("type") or "").endswith("xfail") or "xfail" in (
                    child.get("message") or ""
                )
                state = "xfailed" if xfail else "skipped"
        outcomes[f"{case.get('classname', '')}::{name}"] = state
    return outcomes


def _junit_key(nodeid: str) -> str:
    """pytest's node id (tests/faults/test_x.py::test_y) as _outcomes names it."""
    path, _, name = nodeid.partition("::")
    return f"{path.removesuffix('.py').replace('/', '.')}::{name}"


def _verdict(row: dict, outcomes: dict[str, str]) -> str:
    test = row.get("test")
    if not test:
        return "-"
    return outcomes.get(_junit_key(test), "?")


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    env = dict(os.environ)
    if not env.get("DATABASE_URL", "").startswith(("postgres://", "postgresql://")):
        env["DATABASE_URL"] = env.get(
            "FAULTS_DATABASE_URL", "postgresql://postgres@127.0.0.1:5432/labbook_faults"
        )
    data_dir = Path(env.get("LABBOOK_DATA_DIR") or ROOT / "var")
    env.setdefault("LABBOOK_DATA_DIR", str(data_dir))
    with tempfile.TemporaryDirectory(prefix="labbook-faults-") as scratch:
        report = Path(scratch) / "faults.jsonl"
        junit = Path(scratch) / "junit.xml"
        env["FAULT_REPORT"] = str(report)
        command = [
            sys.executable, "-m", "pytest", "tests/faults", "-p", "no:cacheprovider",
            "-q", "-rxXs", f"--junitxml={junit}", *argv,
        ]  # fmt: skip
        print("faults: " + " ".join(command[2:]), flush=True)
        done = subprocess.run(command, cwd=ROOT, env=env)
        rows = (
            [json.loads(line) for line in report.read_text().splitlines()]
            if report.exists()
            else []
        )
        outcomes = _outcomes(junit) if junit.exists() else {}

    print()
    print(f"{'fault':<40} {'tries':>6} {'survived':>9} {'lost':>5}  {'verdict':<8} note")
    for row in rows:
        row["verdict"] = _verdict(row, outcomes)
        print(
            f"{row['fault']:<40} {row['tries']:>6} {row['survived']:>9} {row['lost']:>5}  "
            f"{row['verdict']:<8} {row.get('note', '')}"
        )
    failed = [name for name, state in outcomes.items() if state == "failed"]
    known = [name for name, state in outcomes.items() if state == "xfailed"]
    skipped = [name for name, state in outcomes.items() if state == "skipped"]
    print(
        f"\n{sum(s == 'passed' for s in outcomes.values())} passed, {len(failed)} failed, "
        f"{len(known)} known bugs (xfail), {len(skipped)} skipped"
    )
    for name in known:
        print(f"  known bug: {name}")
    for name in failed:
        print(f"  FAILED: {name}")
    lost = sum(row["lost"] for row in rows)
    output = data_dir / "bench" / "faults.json"
    output.parent.mkdir(parents=True, exist_ok=True)
    output.write_text(
        json.dumps(
            {"scenarios": rows, "tests": outcomes, "lost": lost, "exit_status": done.returncode},
            indent=2,
        )
        + "\n"
    )
    print(f"faults: table written to {output}")
    return done.returncode or (1 if lost else 0)


if __name__ == "__main__":
    sys.exit(main())
