"""Faults during a run: killed processes, damaged cache entries, a full disk, two runs at once.

What must hold (issue 9, "Faults"; common practice for crash-safe stores, no
source): a run killed at any point leaves only whole cache entries and whole run
files, its run folder is reported unfinished by ``verify``, and the next run
completes with what was cached; a damaged cache entry is found and recomputed; a
disk that fills up ends the run with a clear error (exit 3) and never a run folder
that verifies as intact; two runs at once on one cache and one output folder both
complete, each in its own run folder.

Kill points are chosen among the run's own I/O calls (``os.fsync``, ``os.replace``,
``os.link``: the moments a file becomes durable or takes its name), so each point
is reproducible; one more kill comes from outside at a seeded random moment.
"""

from __future__ import annotations

import errno
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INTEGRITY, EXIT_LIMIT_FAILED
from lotproof.runner.evaluate.cache import DiskStore
from lotproof.runner.jobs.run import run_lot
from lotproof.runner.record.layout import LEDGER_FILE
from lotproof.runner.record.verify import verify_run

from _builders import noisy_squares, recipe_text, seeded_lot, write_recipe

#: Otsu threshold, opening, measure; the area fraction limit (0.05) fails for this lot
RECIPE = recipe_text("fault-test", method="otsu", clean=True, connectivity=None, max_fraction=0.05)
#: three images, three steps each: nine cache entries in a complete run
IMAGES = 3
STEPS = 3
#: files of a run folder that do not depend on the cache, the time or the run folder's name
STABLE = (
    "recipe.yaml",
    "resolved.json",
    "images.csv",
    "objects.csv",
    "inputs.json",
    "verdicts.json",
)


def _image(seed: int) -> np.ndarray:
    """72x72 uint8 noise with six bright 7x7 squares at seeded places."""
    return noisy_squares(seed, side=72, count=6, square=7, bright=230, corners=(4, 62))


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    """One lot and one recipe for every test, and a reference run made without a cache."""
    root = tmp_path_factory.mktemp("faults")
    lot = seeded_lot(root, IMAGES, _image, names="part-{}.tif")
    recipe = write_recipe(root, RECIPE)
    reference = run_lot(recipe, lot, root / "reference")
    assert reference.exit_code == EXIT_LIMIT_FAILED  # the lot fails its limit: exit 1 throughout
    files = _stable_files(reference.run_dir)
    assert set(STABLE) <= set(files) and any(name.startswith("figures/") for name in files)
    return {"root": root, "lot": lot, "recipe": recipe, "files": files, "code": reference.exit_code}


def _run_folders(out: Path) -> list[Path]:
    """The run folders in ``out`` (beside them lies the catalogue, history.sqlite)."""
    return sorted(p for p in out.iterdir() if p.is_dir()) if out.exists() else []


def _stable_files(run: Path) -> dict[str, bytes]:
    figures = [
        p.relative_to(run).as_posix()
        for p in sorted(run.glob("figures/*"))
        if not p.name.startswith(".tmp-")
    ]  # a temporary file is not a run file
    names = list(STABLE) + figures
    return {name: (run / name).read_bytes() for name in names if (run / name).is_file()}


def _entries(cache: Path) -> dict[str, Path]:
    """Every cache entry by key (temporary files are not entries)."""
    return {path.parent.name + path.name: path for path, _ in DiskStore(cache).entries()}


def _assert_cache_whole(cache: Path) -> dict[str, Path]:
    store = DiskStore(cache)
    entries = _entries(cache)
    for key in entries:
        assert store.get(key) is not None, key
    assert store.drain_messages() == []  # no entry was half-written under its own name
    return entries


def _assert_unfinished(
    run: Path,
    world: dict[str, object],
    capsys: pytest.CaptureFixture[str],
    status: str = "unfinished",
) -> None:
    report = verify_run(run)
    assert report.status == status, report.problems
    with pytest.raises(SystemExit) as ended:
        main(["verify", str(run)])
    assert ended.value.code == (EXIT_INTEGRITY if status == "unfinished" else 0)
    assert status.upper() in capsys.readouterr().out
    # whatever run file got its name is whole: the same bytes as the reference run's
    reference = world["files"]
    assert isinstance(reference, dict)
    for name, data in _stable_files(run).items():
        assert data == reference[name], name


def _next_run_completes(
    world: dict[str, object], cache: Path, out: Path, cached: dict[str, Path]
) -> None:
    summary = run_lot(world["recipe"], world["lot"], out, store=DiskStore(cache))  # type: ignore[arg-type]
    assert summary.exit_code == world["code"]
    assert verify_run(summary.run_dir).status == "intact"
    assert _stable_files(summary.run_dir) == world["files"]
    records = [record for result in summary.results for record in result.steps]
    assert len(records) == IMAGES * STEPS
    for record in records:
        if record.key in cached:  # what the killed run cached is used, not computed again
            assert record.cache != "computed", record
    assert len(_entries(cache)) == IMAGES * STEPS


# ---------------------------------------------------------------- killed runs

_KILLED_RUN = """
import atexit, os, signal, sys
point, when, count_file = int(sys.argv[1]), sys.argv[2], sys.argv[3]
seen = [0]
def counted(call):
    def wrapper(*args, **kwargs):
        seen[0] += 1
        if seen[0] == point and when == "before":
            os.kill(os.getpid(), signal.SIGKILL)
        out = call(*args, **kwargs)
        if seen[0] == point and when == "after":
            os.kill(os.getpid(), signal.SIGKILL)
        return out
    return wrapper
os.fsync, os.replace, os.link = counted(os.fsync), counted(os.replace), counted(os.link)
atexit.register(lambda: open(count_file, "w").write(str(seen[0])))
from lotproof.runner.cli.main import main
main(sys.argv[4:])
"""


def _killed_run(
    world: dict[str, object], folder: Path, point: int, when: str
) -> subprocess.CompletedProcess[bytes]:
    argv = [
        "run",
        str(world["recipe"]),
        str(world["lot"]),
        "--out",
        str(folder / "runs"),
        "--cache",
        str(folder / "cache"),
        "-j",
        "1",
        "-q",
    ]
    return subprocess.run(
        [sys.executable, "-c", _KILLED_RUN, str(point), when, str(folder / "count"), *argv],
        capture_output=True,
        timeout=120,
        check=False,
    )


@pytest.fixture(scope="module")
def io_points(world: dict[str, object]) -> int:
    """How many I/O points a complete cold run passes (the same every time with -j 1)."""
    folder = Path(str(world["root"])) / "counted"
    folder.mkdir()
    done = _killed_run(world, folder, 0, "never")
    assert done.returncode == world["code"], done.stderr.decode()
    return int((folder / "count").read_text())


def _kill_points() -> list[tuple[float, str]]:
    # Fractions of the run's I/O points; seeded, so the same points every time.
    rng = random.Random(9)
    picked = sorted({round(rng.random(), 3) for _ in range(4)})
    return (
        [(0.0, "before")]
        + [(f, rng.choice(["before", "after"])) for f in picked]
        + [(0.999, "after"), (1.0, "before")]
    )


@pytest.mark.parametrize(("fraction", "when"), _kill_points())
def test_a_run_killed_at_an_io_point(
    world: dict[str, object],
    io_points: int,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    fraction: float,
    when: str,
) -> None:
    point = max(1, min(io_points, round(fraction * io_points)))
    if fraction == 0.999:
        point = io_points - 1  # just after the output events, before run-end
    killed = _killed_run(world, tmp_path, point, when)
    assert killed.returncode == -signal.SIGKILL, killed.stderr.decode()
    cached = _assert_cache_whole(tmp_path / "cache")
    runs = _run_folders(tmp_path / "runs")
    assert len(runs) <= 1
    # The last I/O point is the fsync of the ledger's run-end line: killed there, the
    # line is written and the record is whole. Killed anywhere before, it is unfinished.
    status = "intact" if point == io_points else "unfinished"
    for run in runs:
        _assert_unfinished(run, world, capsys, status)
    if fraction == 1.0:  # killed at the very end: every image was analysed and cached
        assert len(cached) == IMAGES * STEPS and len(runs) == 1
    _next_run_completes(world, tmp_path / "cache", tmp_path / "runs", cached)
    assert len(_run_folders(tmp_path / "runs")) == len(runs) + 1
    for run in runs:  # the next run did not touch the killed run's folder
        assert verify_run(run).status == status


def test_a_run_with_workers_killed_from_outside(
    world: dict[str, object], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = [
        "run",
        str(world["recipe"]),
        str(world["lot"]),
        "--out",
        str(tmp_path / "runs"),
        "--cache",
        str(tmp_path / "cache"),
        "-j",
        "2",
        "-q",
    ]
    code = f"from lotproof.runner.cli.main import main; main({argv!r})"
    proc = subprocess.Popen(
        [sys.executable, "-c", code],
        start_new_session=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    time.sleep(random.Random(4).uniform(1.5, 3.5))  # seeded; any moment must be safe
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGKILL)  # the run and its worker processes
    proc.wait(timeout=60)
    cached = _assert_cache_whole(tmp_path / "cache")
    runs = _run_folders(tmp_path / "runs")
    for run in runs:
        if proc.returncode != -signal.SIGKILL:
            assert verify_run(run).status == "intact"  # it finished before the kill
        elif (run / LEDGER_FILE).exists():
            # killed after the run-end line was written (a fast machine): the record is whole
            ended = b'"type":"run-end"' in (run / LEDGER_FILE).read_bytes()
            _assert_unfinished(run, world, capsys, "intact" if ended else "unfinished")
        else:  # killed between making the folder and opening its ledger
            assert not any(run.iterdir())
    _next_run_completes(world, tmp_path / "cache", tmp_path / "runs", cached)


# ---------------------------------------------------------------- damaged cache entries


def test_damaged_cache_entries_are_found_and_recomputed(
    world: dict[str, object], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cache, out = tmp_path / "cache", tmp_path / "runs"
    argv = [
        "run",
        str(world["recipe"]),
        str(world["lot"]),
        "--out",
        str(out),
        "--cache",
        str(cache),
        "-j",
        "1",
    ]
    with pytest.raises(SystemExit) as ended:
        main(argv)
    assert ended.value.code == world["code"]
    entries = sorted(_entries(cache).items())
    assert len(entries) == IMAGES * STEPS
    (k1, flipped), (k2, cut), (k3, swapped), (k4, emptied) = entries[:4]
    raw = bytearray(flipped.read_bytes())
    raw[len(raw) // 2] ^= 0x01  # one bit in the payload
    flipped.write_bytes(bytes(raw))
    cut.write_bytes(cut.read_bytes()[:-7])  # truncated
    swapped.write_bytes(
        entries[5][1].read_bytes()
    )  # another entry's bytes: the header names another key
    emptied.write_bytes(b"")
    capsys.readouterr()
    with pytest.raises(SystemExit) as ended:
        main(argv)
    assert ended.value.code == world["code"]
    err = capsys.readouterr().err
    assert "Traceback" not in err
    for path in (flipped, cut, swapped, emptied):
        assert f"cache entry {path}" in err and "recomputing" in err, err
    assert "hash mismatch" in err
    runs = _run_folders(out)
    assert len(runs) == 2 and verify_run(runs[-1]).status == "intact"
    assert _stable_files(runs[-1]) == world["files"]
    store = DiskStore(cache)
    for key in (k1, k2, k3, k4):
        assert store.get(key) is not None  # rewritten whole
    assert store.drain_messages() == []


# ---------------------------------------------------------------- a full disk


class _FullDisk:
    """os.fsync / os.replace / os.link fail with ENOSPC under ``folder`` after ``after`` successes."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch, folder: Path, after: int):
        self.folder = str(folder)
        self.after = after
        self.count = 0
        real_fsync, real_replace, real_link = os.fsync, os.replace, os.link

        def fsync(fd: int) -> None:
            self._maybe_fail(os.readlink(f"/proc/self/fd/{fd}"))
            real_fsync(fd)

        def replace(src: str, dst: str, **kwargs: object) -> None:
            self._maybe_fail(os.fspath(dst))
            real_replace(src, dst, **kwargs)  # type: ignore[arg-type]

        def link(src: str, dst: str, **kwargs: object) -> None:
            self._maybe_fail(os.fspath(dst))
            real_link(src, dst, **kwargs)  # type: ignore[arg-type]

        monkeypatch.setattr(os, "fsync", fsync)
        monkeypatch.setattr(os, "replace", replace)
        monkeypatch.setattr(os, "link", link)

    def _maybe_fail(self, path: str) -> None:
        if not path.startswith(self.folder):
            return
        self.count += 1
        if self.count > self.after:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def _run_cli(world: dict[str, object], out: Path, cache: Path) -> int | str | None:
    with pytest.raises(SystemExit) as ended:
        main(
            [
                "run",
                str(world["recipe"]),
                str(world["lot"]),
                "--out",
                str(out),
                "--cache",
                str(cache),
                "-j",
                "1",
            ]
        )
    return ended.value.code


@pytest.fixture(scope="module")
def out_points(world: dict[str, object], tmp_path_factory: pytest.TempPathFactory) -> int:
    """How many writes a complete run makes in its output folder."""
    folder = tmp_path_factory.mktemp("counting")
    with pytest.MonkeyPatch.context() as monkeypatch:
        disk = _FullDisk(monkeypatch, folder / "runs", after=10**9)
        assert _run_cli(world, folder / "runs", folder / "cache") == world["code"]
    return disk.count


@pytest.mark.parametrize("fraction", [0.0, 0.2, 0.5, 0.8, 1.0])
def test_a_full_disk_under_the_run_folder_is_a_clear_error(
    world: dict[str, object],
    out_points: int,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
    fraction: float,
) -> None:
    after = min(out_points - 1, int(fraction * out_points))  # the last write fails at 1.0
    _FullDisk(monkeypatch, tmp_path / "runs", after=after)
    code = _run_cli(world, tmp_path / "runs", tmp_path / "cache")
    monkeypatch.undo()
    captured = capsys.readouterr()
    assert code == EXIT_BAD_INPUT, captured.err
    assert "Traceback" not in captured.err and "internal error" not in captured.err
    assert "No space left on device" in captured.err and "error:" in captured.err
    assert "seal:" not in captured.out  # a sealed run is announced only when it is whole
    for run in _run_folders(tmp_path / "runs"):
        assert verify_run(run).status == "unfinished"


def test_a_full_disk_under_the_cache_is_a_note_and_the_run_is_whole(
    world: dict[str, object],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    # The cache is a convenience, the run folder is the evidence: a cache that cannot
    # be written costs time, never a result.
    _FullDisk(monkeypatch, tmp_path / "cache", after=2)
    code = _run_cli(world, tmp_path / "runs", tmp_path / "cache")
    monkeypatch.undo()
    captured = capsys.readouterr()
    assert code == world["code"]
    assert "Traceback" not in captured.err
    notes = [row for row in captured.err.splitlines() if "cannot store results" in row]
    assert len(notes) == 1 and "No space left on device" in notes[0], captured.err
    (run,) = _run_folders(tmp_path / "runs")
    assert verify_run(run).status == "intact"
    assert _stable_files(run) == world["files"]
    _assert_cache_whole(tmp_path / "cache")
    assert not list((tmp_path / "cache").glob("objects/*/.tmp-*"))


# ---------------------------------------------------------------- two runs at once


def test_two_runs_at_once_on_one_cache_and_one_output_folder(
    world: dict[str, object], tmp_path: Path
) -> None:
    argv = [
        "run",
        str(world["recipe"]),
        str(world["lot"]),
        "--out",
        str(tmp_path / "runs"),
        "--cache",
        str(tmp_path / "cache"),
        "-j",
        "1",
        "-q",
    ]
    go = tmp_path / "go"
    # both processes import everything first, then start their runs together
    code = (
        "import os, time\nfrom lotproof.runner.cli.main import main\n"
        f"while not os.path.exists({str(go)!r}):\n    time.sleep(0.01)\n"
        f"main({argv!r})\n"
    )
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", code], stdout=subprocess.PIPE, stderr=subprocess.PIPE
        )
        for _ in range(2)
    ]
    go.write_bytes(b"")
    outcomes = [proc.communicate(timeout=180) + (proc.returncode,) for proc in procs]
    for _, err, returncode in outcomes:
        assert returncode == world["code"], err.decode()
        assert b"Traceback" not in err
    runs = _run_folders(tmp_path / "runs")
    assert len(runs) == 2  # distinct run folders, even when started in the same second
    for run in runs:
        assert verify_run(run).status == "intact"
        assert _stable_files(run) == world["files"]
    _assert_cache_whole(tmp_path / "cache")
    assert len(_entries(tmp_path / "cache")) == IMAGES * STEPS
