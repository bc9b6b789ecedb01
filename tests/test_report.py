"""The run's report: every limit, image and verdict as verdicts.json says; self-contained; reproducible."""

from __future__ import annotations

import base64
import json
import os
import re
import shutil
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import tifffile
from hypothesis import given, settings
from hypothesis import strategies as st

import lotproof.runner.cli.show
from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import RunFolderError
from lotproof.runner.record.folder import CAUTION
from lotproof.runner.record.layout import LEDGER_FILE, REPORT_FILE, SUMS_FILE
from lotproof.runner.record.verify import verify_run
from lotproof.runner.show.report import (
    VERDICT_MARKS,
    _bin_edges,
    _num,
    build_report,
    default_report_path,
    rebuild_report,
    write_report,
)

RECIPE = """\
format: lotproof/1
name: spot-report
revision: 3
summary: Bright spots on a dark field
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
    max: 0.02
  biggest:
    value: stats.ecd_max
    max: 10 um
  mean-fraction:
    value: stats.area_fraction
    over: lot-mean
    range: [0.001, 0.5]
"""


#: how the report prints the fixture's units (source: ISO 80000-1 symbols, from memory)
TYPESET = {"-": "", "um": "\u00b5m"}


def _image(n_spots: int) -> np.ndarray:
    """A 64x64 uint8 image with ``n_spots`` bright squares (sides 3, 4, 5, ...) on a dark field."""
    image = np.full((64, 64), 20, np.uint8)
    for i in range(n_spots):
        y, x = 6 + 16 * (i // 3), 6 + 16 * (i % 3)
        side = 3 + i
        image[y : y + side, x : x + side] = 200
    return image


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished run of three images: 1, 2 and 6 spots (the last fails ``fraction``)."""
    root = tmp_path_factory.mktemp("report")
    lot = root / "lot-A17"
    lot.mkdir()
    for i, n in enumerate([1, 2, 6]):
        tifffile.imwrite(lot / f"disc-{i:02d}.tif", _image(n))
    recipe = root / "recipe.yaml"
    recipe.write_text(RECIPE)
    summary = run_lot(recipe, lot, root / "runs")
    return summary.run_dir


class _Collect(HTMLParser):
    """Rows by their data-limit / data-image attribute, with their text; every URL-bearing attribute."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.limits: dict[str, dict[str, str]] = {}
        self.images: dict[str, dict[str, str]] = {}
        self.lot: dict[str, str] = {}
        self.urls: list[str] = []
        self.tags: set[str] = set()
        self._stack: list[tuple[str, dict[str, str], list[str]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        self.tags.add(tag)
        for key in ("src", "href", "action", "poster", "data"):
            if key in a:
                self.urls.append(a[key])
        if (tag == "tr" and ("data-limit" in a or "data-image" in a)) or a.get(
            "id"
        ) == "lot-verdict":
            self._stack.append((tag, a, []))
        if tag == "td" and self._stack:
            self._stack[-1][2].append("\x1f")  # cell separator
            if "data-value" in a:
                self._stack[-1][1].setdefault("value", a["data-value"])

    def handle_endtag(self, tag: str) -> None:
        if self._stack and tag == self._stack[-1][0]:
            _, a, text = self._stack.pop()
            entry = dict(a, text="".join(text))
            if "data-limit" in a:
                self.limits[a["data-limit"]] = entry
            elif "data-image" in a:
                self.images[a["data-image"]] = entry
            else:
                self.lot = entry

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._stack:
            self._stack[-1][2].append(data)


def _parse(html: bytes) -> _Collect:
    parser = _Collect()
    parser.feed(html.decode("utf-8"))
    parser.close()
    return parser


def test_every_limit_image_and_verdict_is_as_verdicts_json_says(
    finished_run: Path, tmp_path: Path
) -> None:
    out, status = rebuild_report(finished_run, tmp_path / "r.html")
    assert status == "intact"
    page = _parse(out.read_bytes())
    # source: the run's own verdicts.json, written by the limits code, not by the report
    verdicts = json.loads((finished_run / "verdicts.json").read_text())
    assert verdicts["lot_verdict"] == "fail"  # the fixture is built so (6 spots > 2 % area)
    assert page.lot["data-verdict"] == verdicts["lot_verdict"]
    assert "FAIL \u2717" in page.lot["text"]  # a word and a symbol, not colour alone
    assert set(page.limits) == set(verdicts["limits"])
    for name, lv in verdicts["limits"].items():
        row = page.limits[name]
        cells = row["text"].split("\x1f")
        assert row["data-verdict"] == lv["verdict"], name
        assert VERDICT_MARKS[lv["verdict"]] in cells[7], name
        assert cells[2] == lv["value_of"]
        assert cells[3] == lv["over"]
        # the bounds as a certificate prints them: ≤ / ≥ / "a to b", the unit typeset
        unit = TYPESET[lv["unit"]]
        low, high = (None if b is None else format(b, "g") for b in (lv["min"], lv["max"]))
        shown = f" {unit}" if unit else ""
        bound = f"{low} to {high}" if low and high else f"\u2265 {low}" if low else f"\u2264 {high}"
        assert cells[5] == bound + shown
        assert cells[6] == unit
        if lv["over"] != "each":
            assert float(row["value"]) == lv["value"]  # every digit kept in the attribute
            assert cells[4] == format(lv["value"], ".6g")
    assert list(page.images) == list(verdicts["image_verdicts"])
    for image_id, verdict in verdicts["image_verdicts"].items():
        row = page.images[image_id]
        assert row["data-verdict"] == verdict
        assert row["text"].split("\x1f")[-1] == VERDICT_MARKS[verdict]
        # every per-image value of a limit is shown with that image's verdict on it
        for lv in verdicts["limits"].values():
            if lv["over"] == "each":
                entry = lv["images"][image_id]
                name = lv["value_of"].split(".", 1)[1]
                assert f"{name} = {format(entry['value'], '.6g')}" in row["text"]
    assert verdicts["image_verdicts"]["disc-02.tif"] == "fail"


def test_contents_method_provenance_and_caution(finished_run: Path) -> None:
    html = build_report(finished_run).decode()
    text = "".join(_parse(html.encode()).text)
    resolved = json.loads((finished_run / "resolved.json").read_text())
    inputs = json.loads((finished_run / "inputs.json").read_text())
    assert "spot-report, revision 3" in text
    assert resolved["recipe_sha256"] in text
    assert "lot-A17" in text
    assert "0.1.0" in text  # lotproof version, from the run-start event
    for entries in inputs.values():
        assert entries[0]["sha256"] in text
    events = [json.loads(line) for line in (finished_run / LEDGER_FILE).read_text().splitlines()]
    start = events[0]
    assert start["time_utc"] in text
    for library, version in start["libraries"].items():
        assert f"{library} {version}" in text
    assert CAUTION in text
    assert "lotproof verify RUN" in text  # the run's own report points to the seal
    assert verify_run(finished_run).seal not in text


def test_no_external_reference(finished_run: Path) -> None:
    html = build_report(finished_run)
    page = _parse(html)
    assert page.urls, "the report embeds its pictures"
    # pictures embedded; links only to its own parts (a thumbnail opens its full-size overlay)
    embedded = ("data:image/png;base64,", "data:image/jpeg;base64,", "data:image/svg+xml;base64,")
    assert all(
        url.startswith(embedded) or re.fullmatch(r"#(zoom|image)-\d+", url) for url in page.urls
    ), [url[:40] for url in page.urls]
    assert not page.tags & {"link", "script", "iframe", "object", "embed", "base"}
    # base64 may hold '//', so look at everything except the data URIs
    rest = re.sub(rb"data:[a-z/+]+;base64,[A-Za-z0-9+/=]+", b"", html)
    for needle in (b"http:", b"https:", b"//", b"url(", b"@import", b"file:/"):
        assert needle not in rest, needle
    # and inside the embedded plots: no reference out either
    for url in page.urls:
        if url.startswith("data:image/svg+xml"):
            svg = base64.b64decode(url.split(",", 1)[1])
            ET.fromstring(svg)  # well-formed
            assert b'xlink:href="http' not in svg and b'href="http' not in svg
            assert b"<dc:date>" not in svg


def test_identical_inputs_give_identical_bytes(finished_run: Path, tmp_path: Path) -> None:
    import matplotlib

    first = build_report(finished_run)
    copy = tmp_path / "elsewhere" / finished_run.name
    shutil.copytree(finished_run, copy)
    # the user's own matplotlib settings must not reach the report
    with matplotlib.rc_context({"lines.linewidth": 7.0, "font.size": 20, "svg.hashsalt": None}):
        second = build_report(copy)
    assert first == second
    assert first.count(b" data-image=") == 3


def test_write_report_works_on_an_unfinished_record(finished_run: Path, tmp_path: Path) -> None:
    # what run_lot has written when it calls write_report: no SHA256SUMS, no output events yet
    run = tmp_path / finished_run.name
    shutil.copytree(finished_run, run)
    for name in (REPORT_FILE, SUMS_FILE):
        (run / name).unlink(missing_ok=True)
    lines = (run / LEDGER_FILE).read_bytes().splitlines(keepends=True)
    kept = [line for line in lines if json.loads(line)["type"] not in ("output", "run-end")]
    (run / LEDGER_FILE).write_bytes(b"".join(kept))
    assert write_report(run) == REPORT_FILE
    written = (run / REPORT_FILE).read_bytes()
    assert b"lotproof verify RUN" in written
    events = [json.loads(line) for line in kept]
    assert build_report(run, events) == written  # the events passed in, or the file: the same
    with pytest.raises(RunFolderError):
        write_report(run)  # a run file is never rewritten
    assert (run / REPORT_FILE).read_bytes() == written


def test_rebuilt_report_has_the_seal_and_goes_beside_the_run(
    finished_run: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    before = {p.name: p.read_bytes() for p in finished_run.iterdir() if p.is_file()}
    with pytest.raises(SystemExit) as exit_info:
        main(["report", str(finished_run)])
    assert exit_info.value.code == 0
    out = default_report_path(finished_run)
    assert out == finished_run.parent / f"{finished_run.name}-report.html"
    html = out.read_bytes().decode()
    seal = verify_run(finished_run).seal
    assert seal and seal in html and "record intact" in html
    after = {p.name: p.read_bytes() for p in finished_run.iterdir() if p.is_file()}
    assert after == before  # nothing in the run folder was written
    assert verify_run(finished_run).status == "intact"


def test_report_refuses_to_write_into_the_run_folder(finished_run: Path) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["report", str(finished_run), "--out", str(finished_run / "again.html")])
    assert exit_info.value.code == 2
    assert not (finished_run / "again.html").exists()


def test_report_of_an_altered_record_says_so_and_exits_4(
    finished_run: Path, tmp_path: Path
) -> None:
    run = tmp_path / finished_run.name
    shutil.copytree(finished_run, run)
    images = run / "images.csv"
    images.write_bytes(images.read_bytes().replace(b"disc-00.tif,ok", b"disc-00.tif,OK", 1))
    out = tmp_path / "altered.html"
    with pytest.raises(SystemExit) as exit_info:
        main(["report", str(run), "--out", str(out)])
    assert exit_info.value.code == 4
    assert "record altered" in out.read_text()


def test_not_a_run_folder_is_exit_2(tmp_path: Path) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["report", str(tmp_path)])
    assert exit_info.value.code == 2


def test_pdf_without_chromium_is_exit_3_with_a_clear_message(
    finished_run: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setattr(lotproof.runner.cli.show, "find_chromium", lambda: None)
    out = tmp_path / "r.pdf"
    with pytest.raises(SystemExit) as exit_info:
        main(["report", str(finished_run), "--pdf", "--out", str(out)])
    assert exit_info.value.code == 3
    assert "chromium" in capsys.readouterr().err.lower()
    assert not out.exists()


def test_incomplete_image_is_shown_as_incomplete(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    tifffile.imwrite(lot / "disc-00.tif", _image(1))
    (lot / "disc-01.tif").write_bytes(b"not a tiff")
    recipe = tmp_path / "recipe.yaml"
    recipe.write_text(RECIPE)
    run = run_lot(recipe, lot, tmp_path / "runs").run_dir
    page = _parse(build_report(run))
    assert page.lot["data-verdict"] == "incomplete"
    assert "INCOMPLETE ?" in page.lot["text"]
    row = page.images["disc-01.tif"]
    assert row["data-verdict"] == "incomplete"
    assert "could not be analysed" in row["text"]


def test_the_committed_example_run_without_ledger_or_figures_still_reports() -> None:
    example = Path(__file__).resolve().parents[1] / "demo_run" / "example-run"
    html = build_report(example)
    page = _parse(html)
    verdicts = json.loads((example / "verdicts.json").read_text())
    assert page.lot["data-verdict"] == verdicts["lot_verdict"]
    assert set(page.images) == set(verdicts["image_verdicts"])
    assert b"no preview" in html and b"not recorded" in html


#: markup a user can put in a recipe's summary, a lot folder's name or an image file's name
MARKUP = ("<script>alert(1)</script>", '"><img src=x onerror=alert(1)>', "&amp;")
#: every element and attribute the report's templates write; anything else came from the data
WRITTEN_TAGS = {
    "html", "head", "meta", "title", "style", "body", "header", "h1", "h2", "h3", "p", "dl",
    "dt", "dd", "code", "span", "section", "div", "strong", "br", "table", "thead", "tbody",
    "tr", "th", "td", "figure", "img", "figcaption", "ul", "li", "footer", "a",
}  # fmt: skip
WRITTEN_ATTRIBUTES = {
    "lang", "charset", "name", "content", "class", "id", "colspan", "src", "alt",
    "data-verdict", "data-limit", "data-value", "data-image", "data-value-of", "data-step",
    "href", "data-released", "data-role", "data-signature", "data-detail", "data-definition",
}  # fmt: skip
_VOID = {"meta", "br", "img"}


class _Elements(HTMLParser):
    """Every element with its attributes and its whole text (its children's included)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.elements: list[tuple[str, dict[str, str], list[str]]] = []
        self._open: list[list[str]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        text: list[str] = []
        self.elements.append((tag, {k: v or "" for k, v in attrs}, text))
        if tag not in _VOID:
            self._open.append(text)

    def handle_endtag(self, tag: str) -> None:
        if tag not in _VOID:
            self._open.pop()

    def handle_data(self, data: str) -> None:
        for text in self._open:
            text.append(data)

    def find(self, tag: str, **attrs: str) -> list[tuple[dict[str, str], str]]:
        return [
            (a, "".join(text))
            for t, a, text in self.elements
            if t == tag and all(a.get(k.replace("_", "-")) == v for k, v in attrs.items())
        ]


def test_markup_in_a_summary_a_lot_name_and_file_names_is_printed_as_text(
    tmp_path: Path,
) -> None:
    summary = "Bright spots " + " ".join(MARKUP)
    # a file name may hold anything but '/' and NUL on Linux
    lot = tmp_path / 'lot "><img src=x onerror=alert(1)> <i>&amp;'
    lot.mkdir()
    names = ["a<b>&c.tif", '"><img src=x onerror=alert(1)>.tif', "&amp;<br>.tif"]
    for n, name in enumerate(names, start=1):
        tifffile.imwrite(lot / name, _image(n))
    recipe = tmp_path / "<script>alert(1)<" / "recipe.yaml"
    recipe.parent.mkdir()
    recipe.write_text(
        RECIPE.replace("summary: Bright spots on a dark field", f"summary: '{summary}'"),
        encoding="utf-8",
    )
    run = run_lot(recipe, lot, tmp_path / "runs").run_dir
    html = build_report(run)
    page = _Elements()
    page.feed(html.decode("utf-8"))
    page.close()
    # nothing but what the templates write: no element or attribute came from the data
    assert {tag for tag, _, _ in page.elements} <= WRITTEN_TAGS
    assert {name for _, attrs, _ in page.elements for name in attrs} <= WRITTEN_ATTRIBUTES
    assert len(page.find("style")) == 1 and not page.find("script")
    assert all(a["src"].startswith("data:image/") for a, _ in page.find("img"))
    assert all(a["href"].startswith("#") for a, _ in page.find("a"))
    assert b"<script" not in html and b"<img src=x" not in html and b"<b>" not in html
    # and every text reads back exactly as it was written
    assert [text for _, text in page.find("p", **{"class": "summary"})] == [summary]
    assert [text for _, text in page.find("h1")] == [f"Lot {lot.name} \u00b7 spot-report r3"]
    # the lot folder relative to where lotproof ran (here: where the tests run)
    assert f"{lot.name} ({Path(os.path.relpath(lot)).as_posix()})" in [
        text for _, text in page.find("dd")
    ]
    assert f"{recipe}" in [text for _, text in page.find("code")]
    rows = {a["data-image"]: text for a, text in page.find("tr") if "data-image" in a}
    assert set(rows) == set(names)
    strong = [text for _, text in page.find("strong")]
    alts = {a["alt"] for a, _ in page.find("img")}
    files = [text for _, text in page.find("td")]
    for name in names:
        assert name in strong
        assert rows[name].startswith(name)
        outlined = f"{name}: detected objects outlined"
        assert {outlined, f"{outlined}, full size"} <= alts
        assert name in files  # the input files table
    # the only pictures are the builder's own: an image's thumbnail and its full-size overlay
    # (a small lot embeds every one), and one size plot
    assert sum(1 for tag, _, _ in page.elements if tag == "img") == 2 * len(names) + 1


def test_display_numbers() -> None:
    # source: common practice, no source (six significant digits, integers in full)
    assert _num(0.13101577758789062) == "0.131016"
    assert _num(345.0) == "345"
    assert _num(12345678.9) == "1.23457e+07"
    assert _num(None) == "\u2013"
    assert _num(float("nan")) == "undefined"
    assert _num("0.5") == "0.5"


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=1e-3, max_value=1e4), st.floats(min_value=0.0, max_value=1.0))
def test_bins_cover_every_size_with_a_1_2_5_width(high: float, low_fraction: float) -> None:
    low = high * low_fraction
    edges = _bin_edges(low, high)
    widths = np.diff(edges)
    assert edges[0] == 0 and edges[-1] > high
    assert np.allclose(widths, widths[0])
    mantissa = widths[0] / 10 ** np.floor(np.log10(widths[0]) + 1e-9)
    assert any(np.isclose(mantissa, m) for m in (1, 2, 5, 10))
    assert 10 <= len(widths) <= 27  # a 1-2-5 step is at most 2.5 times the wanted width
    # every value falls in a bin (numpy counts the last edge in the last bin)
    counts, _ = np.histogram([low, high], bins=edges)
    assert counts.sum() == 2
