"""The README's "Reliability" section is the output of tests/reliability_table.py."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from reliability_table import (
    readme_section,  # tests/ is on sys.path under pytest's rootdir
)

ROOT = Path(__file__).resolve().parents[1]


def test_the_readme_table_matches_the_test_suite() -> None:
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
    written = readme_section((ROOT / "README.md").read_text(encoding="utf-8"))
    assert written == generated + "\n", (
        "README.md's Reliability section is stale; run `python tests/reliability_table.py` and "
        "paste its output over the section"
    )


def test_the_section_sits_before_the_cautions() -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    assert text.index("## Reliability\n") < text.index("## Cautions\n")
