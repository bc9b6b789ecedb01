"""``lotproof history``: one row per run, newest first, filters, --json, --csv, --rebuild."""

from __future__ import annotations

import csv
import io
import json
from datetime import timedelta
from pathlib import Path

import pytest
from history_support import FAILING_LOT, LOT_PLAN, RERUN_LOT, LotRuns

from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID, EXIT_OK
from lotproof.runner.history.catalogue import Catalogue, rebuild


def _run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    with pytest.raises(SystemExit) as ended:
        main(argv)
    captured = capsys.readouterr()
    return int(ended.value.code or 0), captured.out, captured.err


@pytest.fixture
def catalogue(catalogue_url: str, lot_runs: LotRuns) -> str:
    """A catalogue rebuilt from the session's runs."""
    with Catalogue(catalogue_url) as opened:
        rebuild(opened, [lot_runs.out])
    return catalogue_url


def test_history_lists_every_run_newest_first(
    catalogue: str, lot_runs: LotRuns, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = _run(["history", "--db", catalogue, "--json"], capsys)
    assert code == EXIT_OK
    runs = json.loads(out)
    assert len(runs) == len(LOT_PLAN) + 1
    times = [r["started_utc"] for r in runs]
    assert times == sorted(times, reverse=True)
    first = next(r for r in runs if r["lot"] == "L-01")
    assert set(first) >= {
        "run",
        "run_dir",
        "status",
        "seal",
        "recipe",
        "revision",
        "recipe_sha256",
        "git_commit",
        "lot",
        "customer",
        "order",
        "specification",
        "operator",
        "started_utc",
        "ended_utc",
        "lotproof_version",
        "executor",
        "verdict",
        "limits",
        "values",
    }
    assert (first["recipe"], first["revision"], first["verdict"]) == ("spot-test", 1, "pass")
    assert first["values"]["stats.area_fraction"] == {
        "mean": pytest.approx(7 / 3 / 256),
        "unit": "-",
        "n_images": 3,
    }
    assert {limit["name"] for limit in first["limits"]} == {"fraction", "mean-fraction"}
    # the table names the same runs, with the recipe as NAME rN
    code, out, _ = _run(["history", "--db", catalogue], capsys)
    assert code == EXIT_OK and "spot-test r2" in out and "L-10" in out
    assert f"{len(LOT_PLAN) + 1} runs, newest first" in out
    assert "do not replace" in out


def test_history_filters(catalogue: str, capsys: pytest.CaptureFixture[str]) -> None:
    def lots(*options: str) -> list[str]:
        code, out, err = _run(["history", "--db", catalogue, "--json", *options], capsys)
        assert code == EXIT_OK, err
        return sorted(r["lot"] for r in json.loads(out))

    revision_1 = sorted([n for n, r, _ in LOT_PLAN if r == 1] + [RERUN_LOT])
    assert lots("--revision", "1") == revision_1
    assert lots("--recipe", "spot-test", "--revision", "2") == [n for n, r, _ in LOT_PLAN if r == 2]
    assert lots("--recipe", "other-recipe") == []
    assert lots("--lot", "L-0[1-3]") == ["L-01", "L-02", "L-03"]
    assert lots("--lot", "l-01") == []  # a glob on the lot name keeps its case
    assert lots("--verdict", "fail") == [FAILING_LOT]
    assert len(lots("--verdict", "pass")) == len(LOT_PLAN)
    # dates from the runs' own times (UTC), so the test does not depend on the clock
    with Catalogue(catalogue) as opened:
        times = sorted(r.started_utc for r in opened.runs())
    first, last = times[0].date(), times[-1].date()
    assert len(lots("--since", first.isoformat(), "--until", last.isoformat())) == len(times)
    assert lots("--since", (last + timedelta(days=1)).isoformat()) == []
    assert lots("--until", (first - timedelta(days=1)).isoformat()) == []
    newest = times[-1].strftime("%Y-%m-%dT%H:%M:%SZ")
    assert len(lots("--since", newest)) == times.count(times[-1])
    just_before = (times[0] - timedelta(seconds=1)).strftime("%Y-%m-%dT%H:%M:%S")
    assert lots("--until", just_before) == []  # a time without a zone is UTC


def test_history_csv_has_a_row_per_run(catalogue: str, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = _run(["history", "--db", catalogue, "--csv"], capsys)
    assert code == EXIT_OK
    rows = list(csv.DictReader(io.StringIO(out)))
    assert len(rows) == len(LOT_PLAN) + 1
    failing = next(r for r in rows if r["lot"] == FAILING_LOT)
    assert failing["verdict"] == "fail" and failing["revision"] == "2"
    assert float(failing["stats.area_fraction [-]"]) == pytest.approx(26 / 3 / 256)
    assert failing["status"] == "intact" and len(failing["seal"]) == 64


def test_history_options_that_do_not_go_together(
    catalogue: str, capsys: pytest.CaptureFixture[str]
) -> None:
    assert _run(["history", "--db", catalogue, "--json", "--csv"], capsys)[0] == EXIT_INVALID
    code, _, err = _run(["history", "--db", catalogue, "--since", "last tuesday"], capsys)
    assert code == EXIT_INVALID and "2026-12-01" in err
    assert _run(["history", "--db", catalogue, "--verdict", "maybe"], capsys)[0] == EXIT_INVALID


def test_rebuild_on_the_command_line(
    lot_runs: LotRuns, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = tmp_path / "rebuilt.sqlite"
    code, out, _ = _run(["history", "--rebuild", str(lot_runs.out), "--db", str(db)], capsys)
    assert code == EXIT_OK
    assert f"{len(LOT_PLAN) + 1} runs ({len(LOT_PLAN) + 1} intact)" in out
    code, out, _ = _run(
        ["history", "--rebuild", str(lot_runs.out), "--db", str(db), "--json"], capsys
    )
    document = json.loads(out)
    assert document["counts"] == {"intact": len(LOT_PLAN) + 1} and document["removed"] == []
    with Catalogue(f"sqlite:///{db}") as rebuilt, Catalogue(lot_runs.incremental_url) as made:
        assert rebuilt.dump() == made.dump()
