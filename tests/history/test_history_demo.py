"""``lotproof demo history``: the seeded lots, their runs, the history and the trend they give."""

from __future__ import annotations

import json
import re
from collections import Counter
from datetime import date
from pathlib import Path

import pytest

from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_OK
from lotproof.runner.history.catalogue import Catalogue, catalogue_url
from lotproof.runner.jobs.demo import SCENARIOS, project_root
from lotproof.runner.jobs.history_demo import GENERATOR, lot_generator


def test_the_generator_is_seeded_and_small(tmp_path: Path) -> None:
    generator = lot_generator(project_root())
    first = generator.write_lots(tmp_path / "a")
    second = generator.write_lots(tmp_path / "b")
    files_a = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*.png"))
    assert files_a == sorted(p.relative_to(tmp_path / "b") for p in (tmp_path / "b").rglob("*.png"))
    for name in files_a:
        data = (tmp_path / "a" / name).read_bytes()
        assert data == (tmp_path / "b" / name).read_bytes()
        assert len(data) < 40_000  # the demo adds no megabytes anywhere
    assert len(first) == len(second) == 32 and len(files_a) == 32 * 4
    assert Counter(lot.revision for lot, _ in first) == {1: 6, 2: 26}
    days = [date.fromisoformat(lot.day) for lot, _ in first]
    assert days == sorted(days) and (days[-1] - days[0]).days >= 60  # several weeks
    truth = json.loads((tmp_path / "a" / "lot-truth.json").read_text())
    assert [lot["drift_sd"] for lot in truth["lots"].values()][-1] > 3
    assert not (project_root() / GENERATOR).with_name("SB-2701").exists()  # nothing kept in git


def test_the_history_demo(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert SCENARIOS["history"].kind == "history"
    with pytest.raises(SystemExit) as ended:
        main(["demo", "history", "--out", str(tmp_path)])
    captured = capsys.readouterr()
    assert ended.value.code == EXIT_OK, captured.err
    out = tmp_path / "history"
    assert "$ lotproof history" in captured.out and "$ lotproof trend" in captured.out
    with Catalogue(catalogue_url(out), must_exist=True) as catalogue:
        runs = catalogue.runs()
    assert len(runs) == 32 and {r.status for r in runs} == {"intact"}
    assert {r.lot_verdict for r in runs} == {"pass"}  # every lot passes its limits ...
    # ... and the trend's zone rules catch the drift of the last lots all the same
    with pytest.raises(SystemExit) as ended:
        main(
            ["trend", str(out), "--recipe", "bearing-porosity", "--value"]
            + ["pore-stats.area_fraction", "--json"]
        )
    trend = json.loads(capsys.readouterr().out)
    assert [s["revisions"] for s in trend["segments"]] == [[1], [2]]
    assert [s["baseline"] for s in trend["segments"]] == [6, 20]
    flagged = [p["index"] for p in trend["points"] if p["flags"]]
    assert flagged and min(flagged) > 26  # the drift starts at lot 27, after the baseline
    assert 32 in flagged
    assert trend["cpk"] is not None and trend["indicative"] is False
    assert any("r1 -> r2 at point 7" in note for note in trend["notes"])
    page = (out / "trend.html").read_text(encoding="utf-8")
    assert not re.search(r"""(src|href)=["'](https?:)?//""", page)
    assert page.count("<a href=") == 32  # every lot links to its report
