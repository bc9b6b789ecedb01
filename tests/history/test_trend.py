"""``lotproof trend``: one point per lot, segments per revision, rules, capability, the page.

The session's lots have known spot counts, so every point is a known fraction
(spots / 256 per image); the limits are recomputed here with numpy from their
formulas, apart from the project's code.
"""

from __future__ import annotations

import json
import math
import re
import shutil
from html import unescape
from pathlib import Path
from urllib.parse import unquote

import numpy as np
import pytest
import tifffile
from history_support import FAILING_LOT, LOT_PLAN, RERUN_LOT, LotRuns, make_lot

from lotproof import load_recipe, run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INVALID, EXIT_OK
from lotproof.runner.history.catalogue import Catalogue, rebuild
from lotproof.runner.history.entry import run_key
from lotproof.runner.history.trend import TrendError, lot_trend
from lotproof.runner.record.folder import CAUTION
from lotproof.runner.show.trend import build_trend_page, write_trend_page

VALUE = "stats.area_fraction"
#: d2 for moving ranges of two: 2 / sqrt(pi), the closed form (tests/reference checks it)
D2 = 2 / math.sqrt(math.pi)
D4 = 1 + 3 * math.sqrt(2 - 4 / math.pi) / D2


def _run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    with pytest.raises(SystemExit) as ended:
        main(argv)
    captured = capsys.readouterr()
    return int(ended.value.code or 0), captured.out, captured.err


@pytest.fixture
def catalogue(catalogue_url: str, lot_runs: LotRuns) -> str:
    with Catalogue(catalogue_url) as opened:
        rebuild(opened, [lot_runs.out])
    return catalogue_url


def _expected_means() -> dict[str, float]:
    return {name: float(np.mean(spots)) / 256 for name, _, spots in LOT_PLAN}


def _limits(values: list[float]) -> tuple[float, float, float]:
    """centre, MR-bar, sigma_within of baseline values (numpy, from the formulas)."""
    data = np.asarray(values)
    mr_bar = float(np.mean(np.abs(np.diff(data))))
    return float(np.mean(data)), mr_bar, mr_bar / D2


def test_one_point_per_lot_two_revisions_rules_and_capability(catalogue: str) -> None:
    with Catalogue(catalogue) as opened:
        trend = lot_trend(opened, "spot-test", VALUE, baseline=4)
    means = _expected_means()
    assert [p.lot for p in trend.points] == [name for name, _, _ in LOT_PLAN]
    assert [p.revision for p in trend.points] == [r for _, r, _ in LOT_PLAN]
    for point in trend.points:
        assert point.value == pytest.approx(means[point.lot], rel=1e-12)
        assert point.n_images == 3
    # the lot run twice: its latest intact run counts, the earlier one is listed as such
    rerun = next(p for p in trend.points if p.lot == RERUN_LOT)
    (superseded,) = [e for e in trend.excluded if e.status == "superseded"]
    assert superseded.lot == RERUN_LOT and rerun.run_name in superseded.why
    assert any(f"lot {RERUN_LOT} was run 2 times" in note for note in trend.notes)
    # a revision change starts a new baseline
    first, second = trend.segments
    assert [p.lot for p in first.points] == ["L-01", "L-02", "L-03", "L-04"]
    assert first.revisions == [1] and second.revisions == [2]
    assert any("r1 -> r2 at point 5 (lot L-05): a new baseline starts" in n for n in trend.notes)
    for segment in trend.segments:
        base = [means[p.lot] for p in segment.points[:4]]
        centre, mr_bar, sigma = _limits(base)
        assert segment.limits is not None
        assert segment.limits.center == pytest.approx(centre, rel=1e-12)
        assert segment.limits.mr_bar == pytest.approx(mr_bar, rel=1e-12)
        assert segment.limits.sigma_within == pytest.approx(sigma, rel=1e-12)
        assert segment.limits.ucl == pytest.approx(centre + 3 * sigma, rel=1e-12)
        assert segment.limits.lcl == pytest.approx(centre - 3 * sigma, rel=1e-12)
        assert segment.limits.mr_ucl == pytest.approx(D4 * mr_bar, rel=1e-12)
        assert segment.sigma_overall == pytest.approx(float(np.std(base, ddof=1)), rel=1e-12)
    # no moving range reaches across the revision change
    assert second.points[0].mr is None and first.points[0].mr is None
    # revision 2's baseline (L-05..L-08) is tight: the failing lot L-09 is 55 sigma above
    # (WE1) and its moving range, and the next one back, are above D4 MR-bar (MR); L-10
    # is 2.5 sigma below but alone there; revision 1's points stay inside its limits
    assert {p.lot: p.flags for p in trend.points if p.flags} == {
        FAILING_LOT: ["WE1", "MR"],
        "L-10": ["MR"],
    }
    # capability against the lot-mean limit (range 0.001 to 0.05), about the baseline
    assert second.spec is not None and second.spec.name == "mean-fraction"
    centre, _, sigma = _limits([means[p.lot] for p in second.points[:4]])
    overall = float(np.std([means[p.lot] for p in second.points[:4]], ddof=1))
    assert second.indices is not None
    assert second.indices.cp == pytest.approx((0.05 - 0.001) / (6 * sigma), rel=1e-9)
    assert second.indices.cpk == pytest.approx(min(0.05 - centre, centre - 0.001) / (3 * sigma))
    assert second.indices.pp == pytest.approx((0.05 - 0.001) / (6 * overall), rel=1e-9)
    assert second.indices.ppk == pytest.approx(min(0.05 - centre, centre - 0.001) / (3 * overall))
    assert second.indicative  # 4 baseline lots, fewer than 20
    assert any("indicative" in note for note in trend.notes)


def test_the_json_document(catalogue: str, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = _run(
        ["trend", "--db", catalogue, "--recipe", "spot-test", "--value", VALUE, "--json"], capsys
    )
    assert code == EXIT_OK
    document = json.loads(out)
    for key in (
        "recipe",
        "value",
        "unit",
        "points",
        "center",
        "ucl",
        "lcl",
        "mr_bar",
        "sigma_within",
        "sigma_overall",
        "cp",
        "cpk",
        "pp",
        "ppk",
        "baseline",
        "excluded",
    ):
        assert key in document, key
    assert (document["recipe"], document["value"], document["unit"]) == ("spot-test", VALUE, "-")
    assert set(document["points"][0]) >= {
        "lot",
        "run",
        "time",
        "revision",
        "value",
        "n_images",
        "flags",
    }
    # the default baseline: 20 lots of each revision, or all when fewer
    assert document["baseline"] == 6 and [s["baseline"] for s in document["segments"]] == [4, 6]
    centre, mr_bar, sigma = _limits([_expected_means()[n] for n, r, _ in LOT_PLAN if r == 2])
    assert document["center"] == pytest.approx(centre)
    assert document["mr_bar"] == pytest.approx(mr_bar)
    assert document["sigma_within"] == pytest.approx(sigma)
    assert document["limit"]["name"] == "mean-fraction" and document["indicative"] is True
    assert document["caution"] == CAUTION
    assert [e["status"] for e in document["excluded"]] == ["superseded"]
    assert document["xbar_s"] is not None and len(document["xbar_s"]) == len(LOT_PLAN)


def test_across_revisions_one_baseline(catalogue: str) -> None:
    with Catalogue(catalogue) as opened:
        trend = lot_trend(opened, "spot-test", VALUE, across_revisions=True)
    (segment,) = trend.segments
    assert segment.revisions == [1, 2] and len(segment.baseline_points) == len(LOT_PLAN)
    values = [_expected_means()[n] for n, _, _ in LOT_PLAN]
    assert segment.limits is not None
    assert segment.limits.mr_bar == pytest.approx(_limits(values)[1])
    assert any("--across-revisions" in note for note in trend.notes)


def test_baseline_until_a_time(catalogue: str) -> None:
    with Catalogue(catalogue) as opened:
        everything = lot_trend(opened, "spot-test", VALUE)
        until = everything.points[5].time
        assert until is not None
        trend = lot_trend(opened, "spot-test", VALUE, baseline_until=until)
    expected = [p.lot for p in everything.points if p.time is not None and p.time <= until]
    assert [p.lot for p in trend.points if p.baseline] == expected
    assert trend.baseline_rule.startswith("lots run up to")


def test_subgroup_charts_follow_the_published_formulas(catalogue: str) -> None:
    with Catalogue(catalogue) as opened:
        trend = lot_trend(opened, "spot-test", VALUE, baseline=4)
    second = trend.segments[1]
    assert second.subgroups is not None and second.subgroups.equal_sizes
    groups = [np.array(spots) / 256 for name, r, spots in LOT_PLAN if r == 2][:4]
    s_bar = float(np.mean([np.std(g, ddof=1) for g in groups]))
    assert second.subgroups.center == pytest.approx(float(np.mean([g.mean() for g in groups])))
    assert second.subgroups.s_bar == pytest.approx(s_bar)
    point = second.points[0]
    # A3, B3, B4 for n = 3: 1.954, 0, 2.568 (Montgomery, Appendix VI; see tests/reference)
    assert point.xbar_limits is not None and point.s_limits is not None
    assert point.xbar_limits[1] - second.subgroups.center == pytest.approx(1.954 * s_bar, rel=1e-3)
    assert point.s_limits == pytest.approx((0.0, 2.568 * s_bar), rel=1e-3)


def test_altered_unfinished_and_incomplete_runs(
    catalogue_url: str, lot_runs: LotRuns, tmp_path: Path
) -> None:
    extra = tmp_path / "more-runs"
    extra.mkdir()
    altered = extra / (lot_runs.runs[1].name + "-copy")
    shutil.copytree(lot_runs.runs[1], altered)
    (altered / "verdicts.json").write_text("{}")
    recipe = load_recipe(lot_runs.recipes[2])

    def stop(_: object) -> None:
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_lot(recipe, lot_runs.lots["L-10"], extra, on_image=stop, catalogue=False)
    # a lot with one analysed image and one that cannot be read
    lot = make_lot(tmp_path / "lots", "L-11", [3])
    (lot / "disc-01.tif").write_bytes(b"")
    incomplete = run_lot(recipe, lot, extra, catalogue=False)
    assert incomplete.verdicts.lot == "incomplete"
    with Catalogue(catalogue_url) as opened:
        rebuild(opened, [lot_runs.out, extra])
        trend = lot_trend(opened, "spot-test", VALUE)
    why = {e.status: e for e in trend.excluded}
    assert set(why) == {"altered", "unfinished", "superseded"}
    assert why["altered"].run_dir == run_key(altered) and "verdicts.json" in why["altered"].why
    assert why["unfinished"].lot == "L-10"
    # the incomplete lot counts with its analysed image only
    last = trend.points[-1]
    assert (last.lot, last.n_images) == ("L-11", 1)
    assert last.value == pytest.approx(3 / 256)
    # one lot with one image: no x-bar and s chart, and the notes say why
    assert not trend.has_subgroups
    assert any("no x-bar and s chart: lot L-11 has 1 analysed image" in n for n in trend.notes)
    # L-10 is still charted from its intact run
    assert [p.lot for p in trend.points].count("L-10") == 1


def test_bad_options_exit_2_and_no_data_exits_3(
    catalogue: str, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    base = ["trend", "--db", catalogue, "--recipe", "spot-test"]
    code, _, err = _run([*base, "--value", "stats.no_such_value"], capsys)
    assert code == EXIT_INVALID and "stats.area_fraction" in err  # the values it has are listed
    code, _, err = _run([*base, "--value", "not a value"], capsys)
    assert code == EXIT_INVALID and "STEP.NAME" in err
    code, _, err = _run(["trend", "--db", catalogue, "--recipe", "nope", "--value", VALUE], capsys)
    assert code == EXIT_INVALID and "spot-test" in err
    assert _run([*base, "--value", VALUE, "--baseline", "1"], capsys)[0] == EXIT_INVALID
    code, _, _ = _run(
        [*base, "--value", VALUE, "--baseline", "5", "--baseline-until", "2026-01-01"], capsys
    )
    assert code == EXIT_INVALID
    code, _, err = _run([*base, "--value", VALUE, "--limit", "no-such-limit"], capsys)
    assert code == EXIT_INVALID and "no-such-limit" in err
    code, out, _ = _run([*base, "--value", VALUE, "--limit", "fraction", "--json"], capsys)
    assert code == EXIT_OK and json.loads(out)["limit"]["name"] == "fraction"
    # a value the runs have, but never defined for an analysed image
    with Catalogue(catalogue) as opened:
        with pytest.raises(TrendError) as raised:
            lot_trend(opened, "spot-test", VALUE, lot="Z-*")
    assert raised.value.exit_code == EXIT_INVALID
    assert _run(["trend", str(tmp_path), "--recipe", "x", "--value", VALUE], capsys)[0] == (
        EXIT_INVALID  # no catalogue there
    )
    assert EXIT_BAD_INPUT == 3  # the code for "no intact run gives the value" (NoTrendData)


def test_the_trend_page(
    catalogue_url: str, lot_runs: LotRuns, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a lot whose name is markup: the page shows it as text
    odd = make_lot(tmp_path / "lots", "L-<b>odd&", [3, 3])
    tifffile.imwrite(odd / "disc-02.tif", np.full((64, 64), 20, np.uint8))
    extra = tmp_path / "runs"
    run_lot(load_recipe(lot_runs.recipes[2]), odd, extra, catalogue=False)
    with Catalogue(catalogue_url) as opened:
        rebuild(opened, [lot_runs.out, extra])
    page = tmp_path / "pages" / "trend.html"
    code, _, err = _run(
        ["trend", "--db", catalogue_url, "--recipe", "spot-test", "--value", VALUE]
        + ["--baseline", "4", "--html", str(page)],
        capsys,
    )
    assert code == EXIT_OK and f"trend page: {page}" in err
    html = page.read_text(encoding="utf-8")
    assert html.count('<img src="data:image/svg+xml;base64,') == 2  # I-MR, x-bar and s
    assert CAUTION in unescape(html)
    assert "L-&lt;b&gt;odd&amp;" in html and "<b>odd" not in html
    # self-contained: nothing is fetched from anywhere
    assert not re.search(r"""(src|href)=["'](https?:)?//""", html)
    assert "@page { size: A4" in html
    # the flagged points are named with their rules
    flagged = html[html.index("<h2>Flagged points</h2>") : html.index("<h2>Control limits")]
    assert FAILING_LOT in flagged and "one point beyond 3 sigma" in flagged
    # every lot links to its report, relative to the page, and the link resolves
    links = re.findall(r'<a href="([^"]+)">', html)
    assert len(links) == len(LOT_PLAN) + 1
    for link in links:
        assert (page.parent / unquote(link)).resolve().is_file()
    # the same trend gives the same bytes
    with Catalogue(catalogue_url) as opened:
        trend = lot_trend(opened, "spot-test", VALUE, baseline=4)
        shown = opened.shown
    assert build_trend_page(trend, page, catalogue=shown) == page.read_bytes()
    # a report that cannot be reached is named, not linked
    moved = tmp_path / "elsewhere" / "trend.html"
    shutil.rmtree(extra)
    write_trend_page(trend, moved, catalogue=shown)
    assert len(re.findall(r"<a href=", moved.read_text(encoding="utf-8"))) == len(LOT_PLAN)
