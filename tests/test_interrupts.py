"""Ctrl-C at any moment of a run ends lotproof within seconds: exit 130, no traceback,
no process left behind, and a run folder that verifies unfinished (never intact, never
altered)."""

from __future__ import annotations

import functools
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from lotproof.runner.errors import EXIT_INTERRUPTED
from lotproof.runner.record.layout import LEDGER_FILE
from lotproof.runner.record.verify import verify_run

from _builders import noisy_discs, seeded_lot, write_recipe

RECIPE = """format: lotproof/1
name: interrupted
revision: 1
summary: background, threshold, opening, measure
pixel_size: 1 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background
    to: section
    features: bright
    radius: 12 px
  spots:
    apply: threshold
    to: level
    method: otsu
  clean:
    apply: open
    to: spots
    radius: 2 px
  stats:
    apply: measure
    to: clean
"""
#: interrupts per test, at seeded random moments of the run
INTERRUPTS = 12
#: what "within a few seconds" means here, on a loaded 2-core machine
ENDS_WITHIN_S = 20.0


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    root = tmp_path_factory.mktemp("interrupts")
    draw = functools.partial(
        noisy_discs, side=384, count=40, centres=(10, 374), radii=(3, 9), add=300.0
    )
    lot = seeded_lot(root, 32, draw)
    recipe = write_recipe(root, RECIPE)
    started = time.monotonic()
    proc = _start(recipe, lot, root / "calibration")
    _, err = proc.communicate(timeout=600)
    assert proc.returncode in (0, 1), err.decode()  # the uninterrupted run finishes
    return {"root": root, "lot": lot, "recipe": recipe, "seconds": time.monotonic() - started}


def _start(recipe: object, lot: object, out: Path) -> subprocess.Popen[bytes]:
    """``lotproof run`` in a session of its own (close it with ``communicate``)."""
    argv = [
        sys.executable,
        "-m",
        "lotproof",
        "run",
        str(recipe),
        str(lot),
        "--out",
        str(out),
        "--no-cache",
        "-j",
        "2",
        "-q",
    ]
    # a session of its own: the signal goes to the whole group, as Ctrl-C in a terminal does
    return subprocess.Popen(
        argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True
    )


def _alive_in_group(pgid: int) -> list[int]:
    """Processes of the group that still run (a zombie has ended: it only waits to be reaped,
    and not every machine's first process reaps orphans)."""
    alive = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue  # ended meanwhile
        state, group = fields[0], int(fields[2])  # proc(5): state, ppid, pgrp
        if group == pgid and state != "Z":
            alive.append(int(entry.name))
    return alive


def _group_gone(pgid: int, within: float) -> bool:
    deadline = time.monotonic() + within
    while time.monotonic() < deadline:
        if not _alive_in_group(pgid):
            return True
        time.sleep(0.05)
    return False


def test_ctrl_c_at_random_moments_always_ends_the_run(world: dict[str, object]) -> None:
    rng = random.Random(15)  # seeded: the same moments every time
    seconds = float(world["seconds"])  # type: ignore[arg-type]
    outcomes = []
    for attempt in range(INTERRUPTS):
        out = Path(str(world["root"])) / f"runs-{attempt}"
        with _start(world["recipe"], world["lot"], out) as proc:
            moment = rng.uniform(0.05, 0.9 * seconds)
            time.sleep(moment)
            sent = time.monotonic()
            try:
                os.killpg(proc.pid, signal.SIGINT)
            except ProcessLookupError:
                pass
            try:
                _, raw = proc.communicate(timeout=ENDS_WITHIN_S)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.communicate()
                pytest.fail(
                    f"interrupt {attempt} at {moment:.2f} s: still running after {ENDS_WITHIN_S} s"
                )
        code = proc.returncode
        took = time.monotonic() - sent
        err = raw.decode()
        assert "Traceback" not in err, (attempt, moment, err)
        assert _group_gone(proc.pid, 10.0), f"interrupt {attempt}: processes left behind"
        runs = [p for p in out.iterdir() if p.is_dir()] if out.exists() else []
        # -SIGINT: the signal came while Python was shutting down after the run, when
        # Python's own handler is gone; a shell shows it as 130 too (128 + 2)
        assert code in (EXIT_INTERRUPTED, -signal.SIGINT, 0, 1), (attempt, moment, code, err)
        for run in runs:
            if not (run / LEDGER_FILE).exists():
                continue  # interrupted between making the folder and opening its ledger
            sealed = b'"type":"run-end"' in (run / LEDGER_FILE).read_bytes()
            # never altered: unfinished, or intact when the signal came after the seal
            assert verify_run(run).status == ("intact" if sealed else "unfinished"), (
                attempt,
                moment,
            )
        if code in (0, 1):  # the run finished before the signal arrived
            assert len(runs) == 1
        if code == EXIT_INTERRUPTED:
            assert "interrupted" in err
        outcomes.append((round(moment, 2), code, round(took, 2)))
    interrupted = [o for o in outcomes if o[1] == EXIT_INTERRUPTED]
    assert len(interrupted) >= INTERRUPTS // 2, outcomes  # most moments fall inside the run
