"""docs/reliability.md is the output of tests/reliability_table.py."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from reliability_table import DOCUMENT  # tests/ is on sys.path under pytest's rootdir

ROOT = Path(__file__).resolve().parents[1]


def test_the_reliability_page_matches_the_test_suite() -> None:
    # run in its own process: collecting tests inside a running session would re-import them
    env = {k: v for k, v in os.environ.items() if k != "LOTPROOF_FUZZ_EXAMPLES"}
    done = subprocess.run(
        [sys.executable, str(ROOT / "tests" / "reliability_table.py")],
        cwd=ROOT,
        capture_output=True,
        timeout=300,
        check=False,
        env=env,
    )
    assert done.returncode == 0, done.stderr.decode()
    generated = done.stdout.decode("utf-8")
    written = (ROOT / DOCUMENT).read_text(encoding="utf-8")
    assert written == generated, (
        f"{DOCUMENT} is stale; run `python tests/reliability_table.py --write`"
    )


def test_the_readme_links_to_the_reliability_page() -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    assert f"]({DOCUMENT.as_posix()})" in text
