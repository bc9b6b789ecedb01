"""The certificate: lot details, signatures, units, percent, pictures of big lots, provenance."""

from __future__ import annotations

import hashlib
import json
import os
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from lotproof import run_lot
from lotproof.runner.errors import RecipeError
from lotproof.runner.evaluate.pictures import shown_slice, to_display
from lotproof.runner.jobs.approve import approve_run
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.quantities import BoundError, parse_bound
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.show import report as report_module
from lotproof.runner.show.report import (
    PICTURE_BUDGET,
    RunFiles,
    _css_text,
    _slice_text,
    build_report,
    rebuild_report,
)
from lotproof.steps.measure import COLUMN_DEFINITIONS
from lotproof.steps.units import typeset_unit

from _builders import noisy_discs, seeded_lot, signers, spot_image, spot_lot, write_recipe

#: area fraction at most 2 % (written in percent, shown in percent), largest ECD at most 10 um
RECIPE = """\
format: lotproof/1
name: spot-cert
revision: 1
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  spots:
    apply: threshold
    to: section
    method: fixed
    level: 100
  stats:
    apply: measure
    to: spots
    connectivity: 8
limits:
  fraction:
    value: stats.area_fraction
    max: 2 %
    display: percent
  biggest:
    value: stats.ecd_max
    max: 10 um
"""


class _Page(HTMLParser):
    """Text of every element by its id and data-* attributes; every element's attributes."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.by: dict[tuple[str, str], list[str]] = {}
        self.attrs: list[tuple[str, dict[str, str]]] = []
        self._open: list[tuple[str, list[str], list[tuple[str, str]]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        self.attrs.append((tag, a))
        if tag in ("meta", "br", "img"):
            return
        keys = [(k, v) for k, v in a.items() if k == "id" or k.startswith("data-")]
        self._open.append((tag, [], keys))

    def handle_endtag(self, tag: str) -> None:
        if tag in ("meta", "br", "img"):
            return
        _, text, keys = self._open.pop()
        for key in keys:
            self.by.setdefault(key, []).append("".join(text))

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        for _, text, _ in self._open:
            text.append(data)

    def one(self, key: str, value: str) -> str:
        found = self.by.get((key, value), [])
        assert len(found) == 1, (key, value, found)
        return found[0]


def _page(html: bytes) -> _Page:
    page = _Page()
    page.feed(html.decode("utf-8"))
    page.close()
    return page


@pytest.fixture(scope="module")
def cert_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two images (1 and 3 spots: the second fails 2 %), a lot sheet, run from its own folder."""
    root = tmp_path_factory.mktemp("cert")
    (root / "lots").mkdir()
    lot = spot_lot(root / "lots", [1, 3], name="A17")
    (root / "lots" / "A17.lot.yaml").write_text(
        "customer: Example Filters Ltd\norder: 'PO-77'\nspecification: EF-114 rev C\n"
        "sample: two discs\nnote: |\n  line one\n  line two\n"
    )
    recipe = write_recipe(root, RECIPE)
    here = Path.cwd()
    os.chdir(root)  # lotproof runs in the folder that holds lots/
    try:
        from lotproof.runner.recipe.lotsheet import lot_details

        details = lot_details(lot, options={"operator": "J. Tech"}, station="QC bench 2")
        return run_lot(recipe, lot.resolve(), root / "runs", details=details).run_dir
    finally:
        os.chdir(here)


def test_the_sealed_report_shows_the_lot_details_and_where_signatures_are(cert_run: Path) -> None:
    page = _page(build_report(cert_run))
    assert page.one("data-detail", "customer") == "Example Filters Ltd"
    assert page.one("data-detail", "order") == "PO-77"
    assert page.one("data-detail", "specification") == "EF-114 rev C"
    assert page.one("data-detail", "sample") == "two discs"
    assert page.one("data-detail", "operator") == "J. Tech"
    assert page.one("data-detail", "note") == "line one\nline two"
    # the lot folder relative to where lotproof ran, not the absolute temporary path it was given
    assert page.one("data-detail", "lot") == "A17 (lots/A17)"
    assert str(cert_run.parent.parent) not in page.one("id", "lot-details")
    signatures = page.one("id", "signatures")
    assert "lotproof report RUN" in signatures and "approvals.jsonl" in signatures


def test_the_rebuilt_certificate_has_a_signature_block(cert_run: Path, tmp_path: Path) -> None:
    people = signers(tmp_path / "people")
    out, _ = rebuild_report(cert_run, tmp_path / "none.html")
    assert "Not reviewed, not released." in _page(out.read_bytes()).one("id", "signature-block")
    run = tmp_path / cert_run.name
    import shutil

    shutil.copytree(cert_run, run)
    reviewed = approve_run(run, people["reviewer"], role="reviewed", name="Ann Reviewer")
    released = approve_run(run, people["releaser"], role="released", name="Rui Leaser")
    out, status = rebuild_report(run, tmp_path / "cert.html", trust=people["trust"])
    assert status == "intact"
    page = _page(out.read_bytes())
    review, release = page.by[("data-role", "reviewed")], page.by[("data-role", "released")]
    for (row,), record in ((review, reviewed), (release, released)):
        # printed name, meaning, date and time, key fingerprint: what a signature shows
        assert record.name in row and record.time_utc in row and record.key in row
        assert ("Reviewed" if record.role == "reviewed" else "Released") in row
        assert "signature verified" in row
    assert released.hash in page.one("id", "signatures")
    # without a trust folder the signatures are shown, and said to be unchecked
    out, _ = rebuild_report(run, tmp_path / "unchecked.html")
    assert "signature not checked" in _page(out.read_bytes()).one("data-role", "released")


def test_units_are_typeset_and_fractions_in_percent(cert_run: Path) -> None:
    html = build_report(cert_run)
    page = _page(html)
    verdicts = json.loads((cert_run / "verdicts.json").read_text())
    # source: the run's own verdicts.json keeps the fraction; the recipe wrote 2 %
    fraction = verdicts["limits"]["fraction"]
    assert fraction["max"] == 0.02
    rows = page.one("data-limit", "fraction")
    assert "\u2264 2 %" in rows
    values = [v["value"] for v in fraction["images"].values()]
    # source: closed form, 16 px per spot of 4096 px: 1 spot 0.390625 %, 3 spots 1.171875 %
    assert values == [16 / 4096, 3 * 16 / 4096]
    assert "0.390625 to 1.17188" in rows
    assert "area_fraction = 1.17188 %" in page.one("data-image", "disc-01.tif")
    biggest = page.one("data-limit", "biggest")
    assert "\u2264 10 \u00b5m" in biggest and " um" not in biggest
    assert re.search(r"ecd_d50 = [0-9.]+ \u00b5m", page.one("data-image", "disc-00.tif"))
    text = "".join(page.text)
    assert "Pixel size: 0.5 \u00b5m." in text
    # the files keep ASCII units
    header = (cert_run / "images.csv").read_text().splitlines()[0]
    assert "stats.ecd_max [um]" in header and "\u00b5" not in header


@pytest.mark.parametrize(
    ("unit", "shown"),
    [
        ("um", "\u00b5m"),
        ("um2", "\u00b5m\u00b2"),
        ("um3", "\u00b5m\u00b3"),
        ("1/mm2", "mm\u207b\u00b2"),
        ("1/mm", "mm\u207b\u00b9"),
        ("/um", "\u00b5m\u207b\u00b9"),
        ("mm", "mm"),
        ("px2", "px\u00b2"),
        ("-", ""),
        ("1/s", "1/s"),
    ],
)
def test_unit_typesetting(unit: str, shown: str) -> None:
    # source: ISO 80000-1 unit symbols with superscript powers (common practice, no source)
    assert typeset_unit(unit) == shown


def test_percent_bounds_are_hundredths_of_a_fraction() -> None:
    # source: closed form, 1 % = 1/100
    assert parse_bound("18 %", "-") == 0.18
    assert parse_bound("18%", "-") == 0.18
    assert parse_bound("0.5 %", "-") == 0.005
    assert parse_bound(0.18, "-") == 0.18
    with pytest.raises(BoundError, match="does not fit"):
        parse_bound("18 %", "um")
    with pytest.raises(BoundError, match="dimensionless"):
        parse_bound("18 um", "-")


def test_percent_display_only_on_a_dimensionless_value() -> None:
    bad = RECIPE.replace("    max: 10 um\n", "    max: 10 um\n    display: percent\n")
    with pytest.raises(RecipeError) as err:
        parse_recipe(bad.encode(), "r.yaml")
    (problem,) = err.value.problems
    assert (problem.line, problem.where) == (25, "limits.biggest.display")
    assert "percent shows a dimensionless fraction" in problem.what
    with pytest.raises(RecipeError, match="is not one of 'number', 'percent'"):
        parse_recipe(RECIPE.replace("display: percent", "display: permille").encode())


def test_who_ran_it_where_and_only_installed_libraries(cert_run: Path) -> None:
    events = RunFolder(cert_run).events()
    events[0] = dict(events[0], libraries={**events[0]["libraries"], "absent-lib": "not installed"})
    page = _page(build_report(cert_run, events))
    text = "".join(page.text)
    assert "Operator" in text and "J. Tech" in text
    assert "QC bench 2" in text
    assert "absent-lib" not in page.one("id", "libraries")
    assert "not installed" not in page.one("id", "libraries")
    assert "numpy " in page.one("id", "libraries")
    # a station not configured is said so, with the host it ran on
    lot_event = next(i for i, e in enumerate(events) if e["type"] == "lot")
    events[lot_event] = dict(events[lot_event], station=None)
    text = "".join(_page(build_report(cert_run, events)).text)
    assert f"not configured (host {events[0]['host']})" in text


def test_the_circularity_estimator_is_stated_beside_its_column(cert_run: Path) -> None:
    page = _page(build_report(cert_run))
    stated = page.one("data-definition", "circularity (objects.csv)")
    assert COLUMN_DEFINITIONS["circularity"] in stated
    assert "Crofton" in stated and "not bounded by 1" in stated


def test_a_volume_says_which_slice_is_shown() -> None:
    files = RunFiles(
        Path("run"), {}, inputs={"v": [{"shape": [25, 40, 30]}], "i": [{"shape": [40, 30, 3]}]}
    )
    assert _slice_text(files, "v") == "slice 13 of 25 (the middle one; z index 12 from 0)"
    assert _slice_text(files, "i") == ""  # a colour image is no volume
    volume = np.random.default_rng(0).integers(0, 255, (25, 40, 30)).astype(np.uint8)
    assert shown_slice(volume.shape) == 12
    assert np.array_equal(to_display(volume), to_display(volume[12]))


def test_css_text_reads_back_as_written() -> None:
    text = 'Lot A"17</style><b>\\ · µ'
    escaped = _css_text(text)
    assert re.fullmatch(r"[A-Za-z0-9\\ ._-]*", escaped)  # nothing HTML escaping would change
    assert _css_text("20261204T201711Z-spot_test.r2") == "20261204T201711Z-spot_test.r2"
    # source: CSS Syntax Level 3, 4.3.7 (a hex escape, ended by one optional space)
    decoded = re.sub(r"\\([0-9a-f]{1,6}) ?", lambda m: chr(int(m[1], 16)), escaped)
    assert decoded == text


def _big_lot_image(i: int) -> np.ndarray:
    # every 100th image holds four times the discs: it fails the fraction limit
    return noisy_discs(i, side=384, count=160 if i % 100 == 0 else 40, centres=(16, 368),
                       radii=(3, 12), add=300.0)  # fmt: skip


def test_a_500_image_lot_report_stays_under_10_mb(tmp_path: Path) -> None:
    lot = seeded_lot(tmp_path, 500, _big_lot_image, names="crop-{:03d}.tif")
    (lot / "crop-007.tif").write_bytes(b"not a tiff")  # one image that cannot be analysed
    recipe = write_recipe(
        tmp_path,
        RECIPE.replace("level: 100", "level: 1150")
        .replace("max: 2 %", "max: 10 %")
        .replace("max: 10 um", "max: 100 um"),
    )
    run = run_lot(recipe, lot, tmp_path / "runs", jobs=2).run_dir
    html = (run / "report.html").read_bytes()
    # the lot of the issue: 384 x 384 crops; the report used to hold ~400 KB per image
    assert len(html) < 10 * 1024 * 1024, len(html)
    verdicts = json.loads((run / "verdicts.json").read_text())
    failing = [i for i, v in verdicts["image_verdicts"].items() if v == "fail"]
    assert failing == [f"crop-{i:03d}.tif" for i in range(0, 500, 100)]
    assert verdicts["image_verdicts"]["crop-007.tif"] == "incomplete"
    page = _page(html)
    links = {a["href"] for tag, a in page.attrs if tag == "a" and "href" in a}
    thumbs = [a for tag, a in page.attrs if tag == "img" and a["src"].startswith("data:image/jpeg")]
    assert len(thumbs) == 499  # every image with a picture has its compact thumbnail
    zoomed = {a["id"] for tag, a in page.attrs if tag == "div" and a.get("class") == "zoom"}
    rows = {a["data-image"]: a["id"] for tag, a in page.attrs if tag == "tr" and "data-image" in a}
    for image in failing:  # a failing image's full-size overlay is in the file
        number = rows[image].removeprefix("image-")
        assert f"zoom-{number}" in zoomed and f"#zoom-{number}" in links
    assert 0 < len(zoomed) < 100
    # the others are referenced by name and checksum, and the checksum is the file's
    referenced = [href for href in links if href.startswith("figures/")]
    assert len(referenced) + len(zoomed) == 499
    for href in referenced[:20]:
        digest = hashlib.sha256((run / href).read_bytes()).hexdigest()
        assert digest in html.decode()
    embedded = sum(len(a["src"]) for tag, a in page.attrs if tag == "img")
    assert embedded <= PICTURE_BUDGET + 200_000  # the pictures, and the one size plot


def test_figures_left_out_are_linked_from_where_the_report_is(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    lot = seeded_lot(tmp_path, 3, lambda i: spot_image(i + 1))
    run = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs").run_dir
    assert (run / "report.html").read_bytes().count(b'class="zoom"') == 3  # a small lot: all
    monkeypatch.setattr(report_module, "PICTURE_BUDGET", 0)  # as if the lot were huge
    out, _ = rebuild_report(run, tmp_path / "elsewhere" / "cert.html")
    page = _page(out.read_bytes())
    links = [a["href"] for tag, a in page.attrs if tag == "a" and "href" in a]
    assert len(links) == 3 and not out.read_bytes().count(b'class="zoom"')
    for href in links:
        assert href.startswith("../runs/") and (out.parent / href).is_file(), href
