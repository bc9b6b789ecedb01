"""Hostile inputs of the second round: each case was once a hang, a silent pass or a crash."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID, EXIT_OK, RecipeError
from lotproof.runner.evaluate.cache import DiskStore
from lotproof.runner.evaluate.image import entry_bound
from lotproof.runner.recipe.git import git_info, git_show
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.model import MAX_REVISION, MAX_STEPS
from lotproof.runner.record.verify import verify_run

from _builders import write_lot, write_recipe


def _git(repo: Path, *args: str) -> None:
    subprocess.run(["git", "-C", str(repo), *args], check=True, capture_output=True)


@pytest.fixture
def hostile_repo(tmp_path: Path) -> tuple[Path, Path]:
    """A repository whose own configuration names commands: fsmonitor, a filter, textconv, hooks.

    Every such command would leave a canary file in ``canaries/``.
    """
    repo, canaries = tmp_path / "repo", tmp_path / "canaries"
    repo.mkdir()
    canaries.mkdir()
    _git(repo, "init", "-q")
    _git(repo, "config", "user.email", "lab@example.invalid")
    _git(repo, "config", "user.name", "lab")
    recipe = repo / "recipe.yaml"
    recipe.write_text("format: lotproof/1\n", encoding="utf-8")
    (repo / ".gitattributes").write_text("*.yaml filter=trap diff=trap\n", encoding="utf-8")
    _git(repo, "add", ".")
    _git(repo, "commit", "-q", "-m", "recipe")
    script = tmp_path / "trap.sh"
    script.write_text(f'#!/bin/sh\ntouch "{canaries}/$1"\ncat\n', encoding="utf-8")
    script.chmod(0o755)
    hooks = repo / ".git" / "hooks"
    for hook in ("post-checkout", "pre-commit", "post-index-change", "reference-transaction"):
        (hooks / hook).write_text(f'#!/bin/sh\ntouch "{canaries}/hook-{hook}"\n', encoding="utf-8")
        (hooks / hook).chmod(0o755)
    for key, value in (
        ("core.fsmonitor", f"{script} fsmonitor"),
        ("filter.trap.clean", f"{script} clean"),
        ("filter.trap.smudge", f"{script} smudge"),
        ("diff.trap.textconv", f"{script} textconv"),
        ("core.pager", f"{script} pager"),
        ("diff.external", f"{script} external"),
    ):
        _git(repo, "config", key, value)
    recipe.write_text("format: lotproof/1\n# edited\n", encoding="utf-8")
    return recipe, canaries


def test_git_runs_nothing_a_repository_configures(hostile_repo: tuple[Path, Path]) -> None:
    recipe, canaries = hostile_repo
    # The same repository makes plain `git status` run its commands: the trap is real.
    subprocess.run(["git", "-C", str(recipe.parent), "status"], capture_output=True, check=True)
    assert "fsmonitor" in {p.name for p in canaries.iterdir()}
    for canary in canaries.iterdir():
        canary.unlink()

    info = git_info(recipe)
    assert info is not None
    assert info["path_in_repo"] == "recipe.yaml"
    assert info["modified"] is True  # edited after the commit
    assert git_show(str(recipe), "HEAD") == b"format: lotproof/1\n"
    assert list(canaries.iterdir()) == []


def test_modified_compares_the_bytes_with_the_committed_blob(tmp_path: Path) -> None:
    repo = tmp_path / "repo"
    repo.mkdir()
    _git(repo, "init", "-q")
    _git(repo, "config", "user.email", "lab@example.invalid")
    _git(repo, "config", "user.name", "lab")
    recipe = repo / "recipe.yaml"
    recipe.write_bytes(b"format: lotproof/1\n")
    _git(repo, "add", ".")
    _git(repo, "commit", "-q", "-m", "recipe")
    head = subprocess.run(
        ["git", "-C", str(repo), "rev-parse", "HEAD"], capture_output=True, check=True, text=True
    ).stdout.strip()
    assert git_info(recipe) == {"commit": head, "path_in_repo": "recipe.yaml", "modified": False}
    recipe.write_bytes(b"format: lotproof/1\n ")
    assert git_info(recipe)["modified"] is True  # type: ignore[index]
    recipe.write_bytes(b"format: lotproof/1\n")
    assert git_info(recipe)["modified"] is False  # type: ignore[index]
    untracked = repo / "other.yaml"
    untracked.write_bytes(b"format: lotproof/1\n")
    assert git_info(untracked)["modified"] is True  # type: ignore[index]


# ---------------------------------------------------------------- recipe content that once crashed a run


def _chain_recipe(count: int, revision: int = 1) -> str:
    steps = ["  s0:\n    apply: threshold\n    to: section\n    method: otsu\n"]
    steps += [f"  s{i}:\n    apply: invert\n    to: s{i - 1}\n" for i in range(1, count - 1)]
    steps.append(f"  stats:\n    apply: measure\n    to: s{count - 2}\n")
    return (
        f"format: lotproof/1\nname: chain\nrevision: {revision}\nsummary: a chain\n"
        'pixel_size: 1 um\ninputs:\n  section: "*.tif"\nsteps:\n' + "".join(steps)
    )


def test_a_revision_beyond_canonical_json_is_a_recipe_error(tmp_path: Path) -> None:
    with pytest.raises(RecipeError) as raised:
        parse_recipe(_chain_recipe(3, revision=99999999999999999999999).encode(), "r.yaml")
    (problem,) = raised.value.problems
    assert (problem.line, problem.where) == (3, "revision")
    assert str(MAX_REVISION) in problem.what


def test_more_steps_than_the_bound_is_a_recipe_error() -> None:
    with pytest.raises(RecipeError) as raised:
        parse_recipe(_chain_recipe(MAX_STEPS + 1).encode(), "r.yaml")
    assert any(p.where == "steps" and str(MAX_STEPS) in p.what for p in raised.value.problems)


def test_the_longest_chain_allowed_runs(tmp_path: Path) -> None:
    # a chain of MAX_STEPS steps is evaluated to its end (it once ended in RecursionError)
    image = np.zeros((16, 16), np.uint8)
    image[4:9, 4:9] = 200
    lot = write_lot(tmp_path, {"a.tif": image})
    recipe = parse_recipe(_chain_recipe(MAX_STEPS).encode(), "chain.yaml")
    summary = run_lot(recipe, lot, tmp_path / "runs")
    assert summary.exit_code == EXIT_OK, summary.results[0].reason
    # MAX_STEPS - 2 inversions: an even number, so the 25 spot pixels are the objects again
    assert summary.results[0].values[("stats", "count")] == 1.0
    assert summary.results[0].values[("stats", "area_fraction")] == 25 / 256


@pytest.mark.parametrize(
    ("pattern", "why"),
    [
        ("~/*.tif", "'~'"),
        ("~root/x.tif", "'~'"),
        ("a\x00b.tif", "control characters"),
        ("line\nbreak.tif", "control characters"),
        ("  ", "empty"),
    ],
)
def test_globs_of_home_folders_and_control_characters_are_refused(pattern: str, why: str) -> None:
    text = _chain_recipe(3).replace('"*.tif"', json.dumps(pattern))
    with pytest.raises(RecipeError) as raised:
        parse_recipe(text.encode(), "r.yaml")
    assert any(why in p.what and p.where.startswith("inputs") for p in raised.value.problems)


# ---------------------------------------------------------------- the record


def test_an_empty_folder_added_to_a_run_is_an_alteration(record_copy: Path) -> None:
    assert verify_run(record_copy).status == "intact"
    (record_copy / "extra").mkdir()
    report = verify_run(record_copy)
    assert report.status == "altered"
    assert "extra/: not recorded in the ledger (added after the run)" in report.problems
    (record_copy / "extra" / "deeper").mkdir()
    assert (
        "extra/deeper/: not recorded in the ledger (added after the run)"
        in verify_run(record_copy).problems
    )


@pytest.mark.parametrize("option", ["--out", "--cache"])
@pytest.mark.parametrize("where", ["the run", "a folder in the run"])
def test_output_or_cache_inside_a_sealed_run_is_refused(
    record_copy: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], option: str, where: str
) -> None:
    lot = record_copy.parents[1] / "lot"
    recipe = record_copy / "recipe.yaml"
    inside = record_copy if where == "the run" else record_copy / "figures" / "more"
    other = {"--out": tmp_path / "runs", "--cache": tmp_path / "cache"}
    other[option] = inside
    argv = ["run", str(recipe), str(lot), "--out", str(other["--out"])]
    argv += ["--cache", str(other["--cache"])]
    with pytest.raises(SystemExit) as ended:
        main(argv)
    assert ended.value.code == EXIT_INVALID
    err = capsys.readouterr().err
    assert "lies inside the run folder" in err and "Traceback" not in err
    assert verify_run(record_copy).status == "intact"  # nothing was written into it
    assert not (tmp_path / "runs").exists()


# ---------------------------------------------------------------- the cache

_CACHED_RECIPE = """format: lotproof/1
name: cached
revision: 1
summary: threshold and measure
pixel_size: 1 um
inputs:
  section: "*.tif"
steps:
  pores:
    apply: threshold
    to: section
    method: otsu
  clean:
    apply: open
    to: pores
    radius: 1 px
  stats:
    apply: measure
    to: clean
"""


def _cached_world(tmp_path: Path) -> tuple[Path, Path, DiskStore, object]:
    image = np.zeros((40, 40), np.uint8)
    image[5:15, 5:15] = 200
    image[20:32, 22:36] = 180
    lot = write_lot(tmp_path, {"a.tif": image})
    recipe = write_recipe(tmp_path, _CACHED_RECIPE)
    store = DiskStore(tmp_path / "cache")
    cold = run_lot(recipe, lot, tmp_path / "runs", store=store)
    return lot, recipe, store, cold


def _key(summary: object, step: str) -> str:
    return next(s.key for s in summary.results[0].steps if s.step == step)  # type: ignore[attr-defined]


def _records(summary: object) -> dict[str, tuple[str | None, str]]:
    return {s.step: (s.checksum, s.cache) for s in summary.results[0].steps}  # type: ignore[attr-defined]


@pytest.mark.parametrize("step", ["stats", "pores"])  # a reused entry, and a skipped one
def test_a_cache_entry_whose_header_lies_never_reaches_the_record(
    tmp_path: Path, step: str
) -> None:
    lot, recipe, store, cold = _cached_world(tmp_path)
    path = store.path(_key(cold, step))
    header, _, payload = path.read_bytes().partition(b"\n")
    forged = json.loads(header)
    forged["checksum"] = "0" * 64
    path.write_bytes(json.dumps(forged, separators=(",", ":")).encode() + b"\n" + payload)
    warm = run_lot(recipe, lot, tmp_path / "runs", store=DiskStore(tmp_path / "cache"))
    checksum, _ = _records(warm)[step]
    assert checksum != "0" * 64
    assert checksum in (None, _records(cold)[step][0])
    assert any("hash mismatch" in note and "0" * 64 in note for note in warm.results[0].notes)
    assert "0" * 64 not in (warm.run_dir / "steps.csv").read_text()
    step_events = [
        line
        for line in (warm.run_dir / "ledger.jsonl").read_text().splitlines()
        if '"type":"step"' in line
    ]
    assert step_events and not any("0" * 64 in line for line in step_events)


def test_a_cache_entry_larger_than_a_result_can_be_is_never_read(tmp_path: Path) -> None:
    lot, recipe, store, cold = _cached_world(tmp_path)
    path = store.path(_key(cold, "stats"))
    with path.open("ab") as handle:  # grown by far more than the image could give
        handle.truncate(entry_bound(40 * 40) + 1)
    read_sizes: list[int] = []
    real_read = DiskStore._read

    def spy(self: DiskStore, key: str, where: Path, max_bytes: int | None, *, keep: bool) -> object:
        read_sizes.append(where.stat().st_size if where.exists() else -1)
        return real_read(self, key, where, max_bytes, keep=keep)

    DiskStore._read = spy  # type: ignore[method-assign]
    try:
        warm = run_lot(recipe, lot, tmp_path / "runs", store=DiskStore(tmp_path / "cache"))
    finally:
        DiskStore._read = real_read  # type: ignore[method-assign]
    assert read_sizes  # the entry was looked at ...
    notes = warm.results[0].notes
    assert any("more than a result of this image can hold" in note for note in notes)
    assert _records(warm)["stats"] == (_records(cold)["stats"][0], "computed")
    assert warm.exit_code == cold.exit_code  # type: ignore[attr-defined]


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_pipe_in_place_of_a_cache_entry_is_damage_not_a_hang(tmp_path: Path, jobs: int) -> None:
    lot, recipe, store, cold = _cached_world(tmp_path)
    for step in ("stats", "pores"):  # reused, and skipped
        path = store.path(_key(cold, step))
        path.unlink()
        os.mkfifo(path)
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "lotproof",
            "run",
            str(recipe),
            str(lot),
            "--out",
            str(tmp_path / "runs"),
            "--cache",
            str(tmp_path / "cache"),
            "-j",
            str(jobs),
        ],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == cold.exit_code, done.stderr  # type: ignore[attr-defined]
    assert done.stderr.count("not a regular file") >= 1 and "Traceback" not in done.stderr


def test_a_foreign_folder_is_never_taken_as_the_cache(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    image = np.zeros((20, 20), np.uint8)
    image[3:9, 3:9] = 200
    lot = write_lot(tmp_path, {"a.tif": image})
    recipe = write_recipe(tmp_path, _CACHED_RECIPE)
    foreign = tmp_path / "photos"
    foreign.mkdir()
    (foreign / "holiday.jpg").write_bytes(b"not ours")
    with pytest.raises(SystemExit) as ended:
        main(
            ["run", str(recipe), str(lot), "--out", str(tmp_path / "runs"), "--cache", str(foreign)]
        )
    assert ended.value.code == EXIT_INVALID
    err = capsys.readouterr().err
    assert "is not a lotproof cache" in err and "holiday.jpg" in err and "Traceback" not in err
    assert sorted(p.name for p in foreign.iterdir()) == ["holiday.jpg"]
    assert not (tmp_path / "runs").exists()
    # an empty folder, and a folder that is a cache, are fine
    (tmp_path / "empty").mkdir()
    for cache in (tmp_path / "empty", tmp_path / "empty"):
        with pytest.raises(SystemExit) as ended:
            main(
                [
                    "run",
                    str(recipe),
                    str(lot),
                    "--out",
                    str(tmp_path / "runs"),
                    "--cache",
                    str(cache),
                ]
            )
        assert ended.value.code == EXIT_OK


def test_the_ledgers_last_line_is_covered_without_a_key(
    record_copy: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    ledger = record_copy / "ledger.jsonl"
    # source: coreutils sha256sum -c reads '<hex>  <name>' lines (GNU coreutils manual, sha256sum)
    done = subprocess.run(
        ["sha256sum", "-c", "ledger.sha256"],
        cwd=record_copy,
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 0 and "ledger.jsonl: OK" in done.stdout
    last = ledger.read_bytes().splitlines()[-1]
    assert b'"type":"run-end"' in last and b'"exit_code":0' in last
    ledger.write_bytes(ledger.read_bytes().replace(b'"exit_code":0', b'"exit_code":1'))
    report = verify_run(record_copy)
    assert report.status == "altered"
    assert report.problems[0].startswith("ledger.jsonl: its sha256 is not the one ledger.sha256")
    with pytest.raises(SystemExit) as ended:
        main(["export", str(record_copy), "--attestation"])
    assert ended.value.code == 4
    assert "altered" in capsys.readouterr().err


def test_a_finished_run_without_its_ledger_sum_is_altered(record_copy: Path) -> None:
    (record_copy / "ledger.sha256").unlink()
    report = verify_run(record_copy)
    assert report.status == "altered"
    assert "ledger.sha256: missing" in report.problems[0]


def test_a_run_stopped_between_the_ledger_sum_and_run_end_is_unfinished(record_copy: Path) -> None:
    ledger = record_copy / "ledger.jsonl"
    ledger.write_bytes(b"".join(ledger.read_bytes().splitlines(keepends=True)[:-1]))
    report = verify_run(record_copy)
    assert report.status == "unfinished"
    assert not any("ledger.sha256" in p for p in report.problems)


# ---------------------------------------------------------------- pipes where files belong


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_pipe_named_like_an_image_is_refused_not_waited_on(tmp_path: Path, jobs: int) -> None:
    image = np.zeros((20, 20), np.uint8)
    image[3:9, 3:9] = 200
    lot = write_lot(tmp_path, {"a.tif": image})
    os.mkfifo(lot / "x.tif")
    recipe = write_recipe(tmp_path, _CACHED_RECIPE)
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "lotproof",
            "run",
            str(recipe),
            str(lot),
            "--out",
            str(tmp_path / "runs"),
            "--no-cache",
            "-j",
            str(jobs),
            "--json",
        ],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 3, done.stderr  # the lot is incomplete: bad input
    document = json.loads(done.stdout)
    assert document["images"] == 2 and list(document["incomplete"]) == ["x.tif"]
    assert "not a regular file" in document["incomplete"]["x.tif"]


@pytest.mark.parametrize("name", ["ledger.jsonl", "seal.sig"])
def test_verify_refuses_a_pipe_in_the_run_folder(
    record_copy: Path, keys: tuple[Path, Path], name: str
) -> None:
    (record_copy / name).unlink(missing_ok=True)
    os.mkfifo(record_copy / name)
    done = subprocess.run(
        [sys.executable, "-m", "lotproof", "verify", str(record_copy), "--key", str(keys[1])],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 4, done.stderr
    assert "Traceback" not in done.stderr


# ---------------------------------------------------------------- names that clash


def test_images_whose_safe_names_clash_get_unique_recorded_names(tmp_path: Path) -> None:
    image = np.zeros((20, 20), np.uint8)
    image[3:9, 3:9] = 200
    names = ["a b.tif", "a_b.tif", "A_B.tif", "c.tif"]
    lot = write_lot(tmp_path, dict.fromkeys(names, image))
    recipe = write_recipe(
        tmp_path, _CACHED_RECIPE.replace("    radius: 1 px\n", "    radius: 1 px\n    keep: true\n")
    )
    summary = run_lot(recipe, lot, tmp_path / "runs")
    assert summary.exit_code == EXIT_OK
    assert verify_run(summary.run_dir).status == "intact"
    events = [
        json.loads(line) for line in (summary.run_dir / "ledger.jsonl").read_text().splitlines()
    ]
    folders = {e["image"]: e["folder"] for e in events if e["type"] == "image"}
    assert folders["c.tif"] == "c"  # no clash: the plain safe name
    clashing = [folders[n] for n in names[:3]]
    assert len(set(clashing)) == 3
    for name, folder in zip(names[:3], clashing, strict=True):
        # source: the rule stated in record/layout.py, sha256 from hashlib (FIPS 180-4)
        stem = name.removesuffix(".tif").replace(" ", "_")
        assert folder == f"{stem}-" + hashlib.sha256(name.encode()).hexdigest()[:8]
        assert (summary.run_dir / "kept" / folder / "clean.tif").is_file()
        assert (summary.run_dir / "figures" / f"{folder}.overlay.png").is_file()
    # the report finds every image's figures by the same names
    html = (summary.run_dir / "report.html").read_text()
    for folder in folders.values():
        assert f"figures/{folder}.overlay.png" in html


# ---------------------------------------------------------------- steps that would do nothing

ROOT = Path(__file__).resolve().parents[1]
DEMO_RECIPE = ROOT / "recipes" / "filter-disc-porosity.yaml"
DEMO_LOT = ROOT / "demo_run" / "FD-2611"


def test_a_sub_pixel_footprint_is_a_recipe_error_when_the_pixel_size_is_known(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # radius 0.1 um at 0.65 um per pixel: 0.15 px, one pixel; the background subtraction would
    # give zero everywhere and disc 06 (22 % porosity) would pass its 18 % limit
    text = DEMO_RECIPE.read_text().replace("radius: 30 um", "radius: 0.1 um")
    recipe = write_recipe(tmp_path, text)
    for command in ("check", "run"):
        argv = [command, str(recipe)] + (
            [str(DEMO_LOT), "--out", str(tmp_path / "runs")] if command == "run" else []
        )
        with pytest.raises(SystemExit) as ended:
            main(argv)
        assert ended.value.code == EXIT_INVALID
        err = capsys.readouterr().err
        assert "steps.level" in err and "is a single pixel" in err and "zero everywhere" in err
    assert not (tmp_path / "runs").exists()


def test_a_sub_pixel_footprint_makes_each_image_incomplete_when_sizes_come_from_the_image(
    tmp_path: Path,
) -> None:
    text = DEMO_RECIPE.read_text().replace("radius: 30 um", "radius: 0.1 um")
    text = text.replace("pixel_size: 0.65 um", "pixel_size: from-image")
    assert "from-image" in text
    summary = run_lot(parse_recipe(text.encode(), "r.yaml"), DEMO_LOT, tmp_path / "runs")
    assert summary.exit_code == 3 and summary.verdicts.lot == "incomplete"
    for result in summary.results:
        assert result.status == "incomplete"
        assert "step 'level' (subtract-background) at this pixel size" in result.reason
        assert "is a single pixel" in result.reason


def test_a_flattened_intermediate_is_no_contrast_never_an_empty_pass(tmp_path: Path) -> None:
    # an opening far larger than the image leaves it constant: the threshold after it says so
    image = np.zeros((24, 24), np.uint8)
    image[4:10, 4:10] = 200
    lot = write_lot(tmp_path, {"a.tif": image})
    text = _CACHED_RECIPE.replace(
        "  pores:\n    apply: threshold\n    to: section\n",
        "  flat:\n    apply: close\n    to: section\n    radius: 40 px\n"
        "  pores:\n    apply: threshold\n    to: flat\n",
    )
    summary = run_lot(parse_recipe(text.encode(), "r.yaml"), lot, tmp_path / "runs")
    (result,) = summary.results
    assert result.status == "incomplete" and summary.verdicts.lot == "incomplete"
    assert "step 'pores' (threshold): no contrast: every pixel of the image is 200" in result.reason
