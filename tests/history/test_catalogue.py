"""The catalogue of runs, on SQLite and on a real PostgreSQL server.

Every test that takes ``catalogue_url`` runs twice: on an SQLite file and on a new
database of the throw-away PostgreSQL server (see conftest.py).
"""

from __future__ import annotations

import dataclasses
import getpass
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
from history_support import LOT_PLAN, RERUN_LOT, LotRuns, make_lot, make_recipe
from sqlalchemy import create_engine, insert, text
from sqlalchemy.pool import NullPool

from lotproof import load_recipe, run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID, EXIT_OK
from lotproof.runner.history import catalogue as catalogue_module
from lotproof.runner.history.catalogue import (
    Catalogue,
    CatalogueError,
    NoCatalogueError,
    catalogue_url,
    rebuild,
    shown_url,
)
from lotproof.runner.history.entry import read_run, run_key
from lotproof.runner.history.schema import SCHEMA_VERSION, schema_version
from lotproof.runner.record.layout import LEDGER_FILE
from lotproof.runner.record.ledger import LedgerWriter
from lotproof.runner.record.verify import verify_run


def _exit(argv: list[str]) -> int:
    with pytest.raises(SystemExit) as ended:
        main(argv)
    return int(ended.value.code or 0)


def _is_postgres(url: str) -> bool:
    return url.startswith("postgresql")


# ---------------------------------------------------------------- what a run leaves there


def test_a_finished_run_is_recorded_with_everything(catalogue_url: str, tmp_path: Path) -> None:
    recipe = make_recipe(tmp_path / "recipes", revision=3)
    lot = make_lot(tmp_path / "lots", "AB-0001", [1, 2, 4])
    summary = run_lot(recipe, lot, tmp_path / "runs", db=catalogue_url)
    assert summary.notes == [] and summary.catalogue == shown_url(catalogue_url)
    with Catalogue(catalogue_url) as catalogue:
        (run,) = catalogue.runs()
        limits = catalogue.limits([run.run_dir])[run.run_dir]
        values = catalogue.values([run.run_dir], "stats", "area_fraction")[run.run_dir]
        names = catalogue.value_names([run.run_dir])
        dump = catalogue.dump()
    assert run.run_dir == run_key(summary.run_dir) and run.status == "intact"
    assert run.seal == summary.seal and run.problem is None
    assert (run.recipe_name, run.recipe_revision) == ("spot-test", 3)
    assert run.recipe_sha256 == load_recipe(recipe).sha256
    assert run.git_commit is None  # the recipe is not in a git work tree
    assert (run.lot, run.lot_path) == ("AB-0001", str(lot))
    # no lot details were given: only the operator, by default the login name
    assert run.customer is run.order_ref is run.specification is None
    assert run.operator == getpass.getuser()
    assert run.started_utc is not None and run.ended_utc is not None
    assert run.started_utc <= run.ended_utc and run.started_utc.utcoffset().total_seconds() == 0
    assert run.lotproof_version == "0.1.0" and run.executor == "local, 1 process"
    assert (run.lot_verdict, run.images, run.incomplete_images, run.exit_code) == ("pass", 3, 0, 0)
    assert {row["name"]: (row["over"], row["high"], row["verdict"]) for row in limits} == {
        "fraction": ("each", 0.05, "pass"),
        "mean-fraction": ("lot-mean", 0.05, "pass"),
    }
    mean_limit = next(row for row in limits if row["name"] == "mean-fraction")
    assert mean_limit["low"] == 0.001 and mean_limit["value"] == pytest.approx(7 / 3 / 256)
    # every per-image value with its unit and the image's status
    assert values == [
        ("disc-00.tif", 1 / 256, "ok"),
        ("disc-01.tif", 2 / 256, "ok"),
        ("disc-02.tif", 4 / 256, "ok"),
    ]
    assert ("stats", "area_fraction", "-") in names and ("stats", "ecd_mean", "um") in names
    assert [row[1:] for row in dump["images"]] == [
        ("disc-00.tif", "ok", "pass", "", 0.5),
        ("disc-01.tif", "ok", "pass", "", 0.5),
        ("disc-02.tif", "ok", "pass", "", 0.5),
    ]
    assert dump["schema_version"] == [(1, "runs, limits, images and per-image values")]


def test_the_default_catalogue_is_history_sqlite_in_the_runs_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("LOTPROOF_DB", raising=False)
    lot = make_lot(tmp_path / "lots", "AB-0002", [1])
    summary = run_lot(make_recipe(tmp_path / "r"), lot, tmp_path / "runs")
    assert (tmp_path / "runs" / "history.sqlite").is_file()
    assert summary.catalogue == f"sqlite:///{tmp_path / 'runs' / 'history.sqlite'}"
    # LOTPROOF_DB names another; --db wins over both; postgresql:// means psycopg 3
    monkeypatch.setenv("LOTPROOF_DB", str(tmp_path / "elsewhere.sqlite"))
    assert catalogue_url(tmp_path / "runs") == f"sqlite:///{tmp_path / 'elsewhere.sqlite'}"
    assert catalogue_url(tmp_path / "runs", "postgresql://lab@db/qc") == (
        "postgresql+psycopg://lab@db/qc"
    )
    assert (
        shown_url("postgresql+psycopg://lab:secret@db/qc") == "postgresql+psycopg://lab:***@db/qc"
    )


def test_lot_details_are_read_from_a_lot_event(catalogue_url: str, tmp_path: Path) -> None:
    # Ledgers do not have lot details yet; a later ledger may carry a `lot` event. A run
    # whose ledger has one (re-chained here, so the record is intact) fills the columns.
    lot = make_lot(tmp_path / "lots", "AB-0003", [2])
    summary = run_lot(make_recipe(tmp_path / "r"), lot, tmp_path / "runs", catalogue=False)
    events = [
        {k: v for k, v in line.items() if k not in ("seq", "prev")}
        for line in map(json.loads, (summary.run_dir / LEDGER_FILE).read_text().splitlines())
    ]
    (summary.run_dir / LEDGER_FILE).unlink()
    (summary.run_dir / "ledger.sha256").unlink()
    details = {
        "customer": "Example Bearings Ltd",
        "order": "PO-77",
        "specification": "SPEC-12 rev B",
        "operator": "technician 4",
    }
    with LedgerWriter(summary.run_dir / LEDGER_FILE) as ledger:
        for event in events:
            kind = event.pop("type")
            if kind == "run-end":
                ledger.append_end(**event)
            else:
                ledger.append(kind, **event)
            if kind == "recipe":
                ledger.append("lot", **details)
    assert verify_run(summary.run_dir).status == "intact"
    with Catalogue(catalogue_url) as catalogue:
        catalogue.record(read_run(summary.run_dir))
        (run,) = catalogue.runs()
    assert (run.customer, run.order_ref, run.specification, run.operator) == tuple(details.values())


# ---------------------------------------------------------------- rebuild


def test_rebuild_gives_the_same_catalogue_as_the_incremental_one(
    catalogue_url: str, lot_runs: LotRuns
) -> None:
    with Catalogue(lot_runs.incremental_url, must_exist=True) as incremental:
        expected = incremental.dump()
    assert len(expected["runs"]) == len(LOT_PLAN) + 1
    assert len(expected["image_values"]) > 100
    with Catalogue(catalogue_url) as catalogue:
        report = rebuild(catalogue, [lot_runs.out])
        assert report.counts() == {"intact": len(LOT_PLAN) + 1} and report.removed == []
        assert catalogue.dump() == expected  # every table's rows, ordered by key
        # again over itself: recording a run twice leaves it recorded once
        rebuild(catalogue, [lot_runs.out])
        assert catalogue.dump() == expected
        # a catalogue that lost runs gets them back
        catalogue.forget(sorted(catalogue.keys())[:4])
        assert len(catalogue.dump()["runs"]) == len(LOT_PLAN) - 3
        rebuild(catalogue, [lot_runs.out])
        assert catalogue.dump() == expected


def test_rebuild_lists_altered_and_unfinished_runs_and_uses_none_of_their_values(
    catalogue_url: str, lot_runs: LotRuns, tmp_path: Path
) -> None:
    folder = tmp_path / "runs"
    folder.mkdir()
    altered = folder / lot_runs.runs[1].name
    shutil.copytree(lot_runs.runs[1], altered)
    with (altered / "images.csv").open("a") as handle:
        handle.write("extra,ok,pass,,0.5\n")
    recipe = load_recipe(lot_runs.recipes[2])

    def stop(_: object) -> None:
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_lot(recipe, lot_runs.lots["L-10"], folder, on_image=stop)
    (unfinished,) = [p for p in folder.iterdir() if p != altered and p.is_dir()]
    (folder / "not-a-run").mkdir()  # folders without a ledger are not runs
    with Catalogue(catalogue_url) as catalogue:
        report = rebuild(catalogue, [folder])
        assert report.counts() == {"altered": 1, "unfinished": 1}
        runs = {r.run_dir: r for r in catalogue.runs()}
        dump = catalogue.dump()
    bad = runs[run_key(altered)]
    assert bad.status == "altered" and "images.csv" in (bad.problem or "")
    assert bad.lot == "L-02" and bad.recipe_name == "spot-test"  # still named, from its ledger
    assert bad.lot_verdict is None and bad.images is None
    unfinished_run = runs[run_key(unfinished)]
    assert unfinished_run.status == "unfinished" and "never finished" in (
        unfinished_run.problem or ""
    )
    # no limit, image or value of either run is in the catalogue
    assert dump["limits"] == dump["images"] == dump["image_values"] == []
    # both folders are as they were: the catalogue only reads them
    assert verify_run(altered).status == "altered"
    assert verify_run(unfinished).status == "unfinished"


def test_rebuild_forgets_runs_gone_from_the_folder_and_keeps_others(
    catalogue_url: str, lot_runs: LotRuns, tmp_path: Path
) -> None:
    mine = tmp_path / "station-a"
    shutil.copytree(lot_runs.runs[0], mine / lot_runs.runs[0].name)
    shutil.copytree(lot_runs.runs[1], mine / lot_runs.runs[1].name)
    with Catalogue(catalogue_url) as catalogue:
        rebuild(catalogue, [mine])
        catalogue.record(read_run(lot_runs.runs[2]))  # another station's run
        shutil.rmtree(mine / lot_runs.runs[1].name)
        report = rebuild(catalogue, [mine])
        assert report.removed == [run_key(mine / lot_runs.runs[1].name)]
        assert catalogue.keys() == {
            run_key(mine / lot_runs.runs[0].name),
            run_key(lot_runs.runs[2]),
        }


# ---------------------------------------------------------------- two at once

_RECORDER = """
import dataclasses, sys, time
from pathlib import Path
from lotproof.runner.history.catalogue import Catalogue
from lotproof.runner.history.entry import read_run
url, run_dir, name, ready, go, count = sys.argv[1:]
entry = read_run(Path(run_dir))
with Catalogue(url) as catalogue:
    Path(ready).touch()
    while not Path(go).exists():
        time.sleep(0.01)
    for i in range(int(count)):
        key = f"{entry.run.run_dir}-{name}-{i}"
        catalogue.record(dataclasses.replace(
            entry,
            run=dataclasses.replace(entry.run, run_dir=key),
            limits=[dataclasses.replace(r, run_dir=key) for r in entry.limits],
            images=[dataclasses.replace(r, run_dir=key) for r in entry.images],
            values=[dataclasses.replace(r, run_dir=key) for r in entry.values],
        ))
"""


def test_two_writers_at_once_both_land(
    catalogue_url: str, lot_runs: LotRuns, tmp_path: Path
) -> None:
    # Two processes, released together, each write 12 runs into one catalogue.
    with Catalogue(catalogue_url):
        pass  # the schema exists before they start (they would also race to make it)
    go = tmp_path / "go"
    procs = []
    for name in ("a", "b"):
        ready = tmp_path / f"ready-{name}"
        procs.append(
            (
                ready,
                subprocess.Popen(
                    [
                        sys.executable,
                        "-c",
                        _RECORDER,
                        catalogue_url,
                        str(lot_runs.runs[0]),
                        name,
                        str(ready),
                        str(go),
                        "12",
                    ],
                    stdout=subprocess.PIPE,
                    stderr=subprocess.PIPE,
                ),
            )
        )
    for ready, proc in procs:
        while not ready.exists():
            assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
            time.sleep(0.01)
    go.touch()
    for _, proc in procs:
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err.decode()
    with Catalogue(catalogue_url) as catalogue:
        keys = catalogue.keys()
        dump = catalogue.dump()
    base = run_key(lot_runs.runs[0])
    assert keys == {f"{base}-{name}-{i}" for name in "ab" for i in range(12)}
    assert len(dump["images"]) == 24 * 3


_OPENER = """
import sys, time
from pathlib import Path
from lotproof.runner.history.catalogue import Catalogue
url, ready, go = sys.argv[1:]
Path(ready).touch()
while not Path(go).exists():
    time.sleep(0.005)
with Catalogue(url) as catalogue:
    print(catalogue.migrate())
"""


def test_a_new_catalogue_opened_by_three_processes_at_once(
    catalogue_url: str, tmp_path: Path
) -> None:
    # They race to make the schema; each makes it or finds it made, none fails.
    go = tmp_path / "go"
    procs = []
    for n in range(3):
        ready = tmp_path / f"ready-{n}"
        proc = subprocess.Popen(
            [sys.executable, "-c", _OPENER, catalogue_url, str(ready), str(go)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
        )
        procs.append((ready, proc))
    for ready, proc in procs:
        while not ready.exists():
            assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
            time.sleep(0.01)
    go.touch()
    for _, proc in procs:
        out, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err.decode()
        assert out.decode().strip() == str(SCHEMA_VERSION)
    with Catalogue(catalogue_url) as catalogue:
        assert catalogue.dump()["schema_version"] == [
            (1, "runs, limits, images and per-image values")
        ]


def test_two_runs_finishing_at_once_both_land(catalogue_url: str, tmp_path: Path) -> None:
    recipe = make_recipe(tmp_path / "recipes")
    lots = [make_lot(tmp_path / "lots", f"CD-{i}", [1, 2]) for i in (1, 2)]
    out = tmp_path / "runs"
    procs = [
        subprocess.Popen(
            [sys.executable, "-m", "lotproof", "run", str(recipe), str(lot), "--out", str(out)]
            + ["--db", catalogue_url, "--no-cache", "-j", "1", "--json"],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
        )
        for lot in lots
    ]
    documents = []
    for proc in procs:
        stdout, stderr = proc.communicate(timeout=300)
        assert proc.returncode == EXIT_OK, stderr.decode()
        documents.append(json.loads(stdout))
    assert [d["notes"] for d in documents] == [[], []]
    with Catalogue(catalogue_url) as catalogue:
        assert sorted(r.lot for r in catalogue.runs()) == ["CD-1", "CD-2"]
        assert catalogue.keys() == {run_key(Path(d["run_dir"])) for d in documents}


# ---------------------------------------------------------------- a catalogue that fails


def _read_only(url: str, postgres: object | None) -> str:
    """The same catalogue, but writes are refused by the database itself."""
    with Catalogue(url):
        pass  # the schema is there; only the run's own write can fail
    if _is_postgres(url):
        engine = create_engine(url, poolclass=NullPool)
        with engine.connect() as connection:
            name = connection.execute(text("select current_database()")).scalar()
        engine.dispose()
        assert postgres is not None
        postgres.admin(f'ALTER DATABASE "{name}" SET default_transaction_read_only = on')  # type: ignore[attr-defined]
        return url
    path = url.removeprefix("sqlite:///")
    return f"sqlite:///file:{path}?mode=ro&uri=true"


def test_a_catalogue_that_refuses_the_write_leaves_the_run_whole_with_a_note(
    catalogue_url: str, tmp_path: Path, request: pytest.FixtureRequest
) -> None:
    server = request.getfixturevalue("postgres_server") if _is_postgres(catalogue_url) else None
    read_only = _read_only(catalogue_url, server)
    lot = make_lot(tmp_path / "lots", "EF-0001", [1, 2])
    out = tmp_path / "runs"
    summary = run_lot(make_recipe(tmp_path / "r"), lot, out, db=read_only)
    assert summary.exit_code == EXIT_OK and summary.catalogue is None
    (note,) = summary.notes
    assert "did not record this run" in note and "read-only" in note.replace(
        "readonly", "read-only"
    )
    assert f"lotproof history --rebuild {out} --db" in note
    report = verify_run(summary.run_dir, expected_seal=summary.seal)
    assert report.status == "intact"
    with Catalogue(read_only) as catalogue:
        assert catalogue.keys() == set()
    # --rebuild recovers it, into a catalogue that takes writes
    writable = tmp_path / "recovered.sqlite"
    assert _exit(["history", "--rebuild", str(out), "--db", str(writable)]) == EXIT_OK
    with Catalogue(f"sqlite:///{writable}") as catalogue:
        assert catalogue.keys() == {run_key(summary.run_dir)}


def test_a_locked_sqlite_catalogue_is_a_note_and_the_run_is_sealed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    url = f"sqlite:///{tmp_path / 'runs' / 'history.sqlite'}"
    (tmp_path / "runs").mkdir()
    with Catalogue(url):
        pass
    monkeypatch.setattr(catalogue_module, "BUSY_TIMEOUT_S", 0.2)
    import sqlite3

    holder = sqlite3.connect(tmp_path / "runs" / "history.sqlite", isolation_level=None)
    try:
        holder.execute("BEGIN EXCLUSIVE")  # another writer that does not let go
        lot = make_lot(tmp_path / "lots", "EF-0002", [1])
        summary = run_lot(make_recipe(tmp_path / "r"), lot, tmp_path / "runs")
    finally:
        holder.close()
    (note,) = summary.notes
    assert "database is locked" in note
    assert verify_run(summary.run_dir, expected_seal=summary.seal).status == "intact"
    assert _exit(["history", "--rebuild", str(tmp_path / "runs")]) == EXIT_OK
    with Catalogue(url) as catalogue:
        assert catalogue.keys() == {run_key(summary.run_dir)}


def test_a_catalogue_file_that_is_not_a_database_is_a_note_on_the_command_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "runs"
    out.mkdir()
    (out / "history.sqlite").write_bytes(b"this is no database, it is a text file\n" * 40)
    lot = make_lot(tmp_path / "lots", "EF-0003", [1])
    recipe = make_recipe(tmp_path / "r")
    code = _exit(["run", str(recipe), str(lot), "--out", str(out), "--no-cache", "-j", "1"])
    captured = capsys.readouterr()
    assert code == EXIT_OK and "Traceback" not in captured.err
    assert "note:" in captured.err and "did not record this run" in captured.err
    (run,) = [p for p in out.iterdir() if p.is_dir()]
    assert verify_run(run).status == "intact"
    assert (out / "history.sqlite").read_bytes().startswith(b"this is no database")


# ---------------------------------------------------------------- schema and migrations


def test_migrations_apply_once_and_a_newer_schema_is_refused(catalogue_url: str) -> None:
    with Catalogue(catalogue_url) as catalogue:
        assert catalogue.migrate() == SCHEMA_VERSION
    with Catalogue(catalogue_url) as catalogue:
        assert catalogue.dump()["schema_version"] == [
            (1, "runs, limits, images and per-image values")
        ]
    engine = create_engine(catalogue_url, poolclass=NullPool)
    with engine.begin() as connection:
        connection.execute(insert(schema_version).values(version=99, description="from the future"))
    engine.dispose()
    with pytest.raises(CatalogueError, match="newer than this lotproof knows"):
        Catalogue(catalogue_url)


def test_reading_commands_need_an_existing_catalogue(tmp_path: Path) -> None:
    with pytest.raises(NoCatalogueError, match="history --rebuild"):
        Catalogue(f"sqlite:///{tmp_path / 'none.sqlite'}", must_exist=True)
    assert not (tmp_path / "none.sqlite").exists()
    assert _exit(["history", str(tmp_path)]) == EXIT_INVALID
    assert _exit(["history", "--rebuild", str(tmp_path / "no-such-folder")]) == EXIT_INVALID


def test_an_unreachable_server_is_a_catalogue_error(tmp_path: Path) -> None:
    url = f"postgresql://nobody@/nothing?host={tmp_path}&port=1"
    with pytest.raises(CatalogueError, match="cannot open the catalogue"):
        Catalogue(catalogue_url(None, url))
    # and for a run it is a note, never a failed run
    lot = make_lot(tmp_path / "lots", "EF-0004", [1])
    summary = run_lot(make_recipe(tmp_path / "r"), lot, tmp_path / "runs", db=url)
    assert summary.exit_code == EXIT_OK and len(summary.notes) == 1
    assert "nobody@" in summary.notes[0]


def test_the_rerun_lot_counts_once_per_run(lot_runs: LotRuns) -> None:
    with Catalogue(lot_runs.incremental_url, must_exist=True) as catalogue:
        runs = catalogue.runs()
    lots = [r.lot for r in runs]
    assert lots.count(RERUN_LOT) == 2 and len(lots) == len(LOT_PLAN) + 1
    # newest first (run times have whole seconds: runs of one second may come in any order)
    times = [r.started_utc for r in runs]
    assert times == sorted(times, reverse=True)
    assert runs[-1].run_dir == run_key(lot_runs.runs[0])


def test_entries_are_plain_data(lot_runs: LotRuns) -> None:
    entry = read_run(lot_runs.runs[0])
    assert dataclasses.asdict(entry)["run"]["status"] == "intact"
    assert os.path.isabs(entry.run.run_dir)
