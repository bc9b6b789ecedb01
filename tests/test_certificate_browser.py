"""The certificate of a reviewed and released demo run, in a real browser and printed to PDF.

The filter-disc demo lot (with its lot sheet) is run, reviewed, released and its
certificate rebuilt (``lotproof report RUN`` and ``--pdf``), all through the command
line. Headless Chromium renders the HTML (its DOM after loading is read back, and a
screenshot is taken); ``pdftotext`` (poppler-utils) reads the PDF, page by page.

In CI (``CI`` set) a missing Chromium or pdftotext is a failure, not a skip:
``.ci/run`` installs Debian's ``chromium`` and ``poppler-utils`` packages. On a
developer's machine without them the tests skip.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from lotproof.runner.cli.main import main
from lotproof.runner.jobs.demo import demo_paths
from lotproof.runner.record.verify import verify_run
from lotproof.runner.show.pdf import chromium_command, find_chromium

from _builders import signers

STATION = "QC bench 2 (demo)"


def _needed(found: str | None, what: str, package: str) -> str:
    if found is None:
        if os.environ.get("CI"):
            pytest.fail(f"{what} is not installed; .ci/run installs Debian's {package} in CI")
        pytest.skip(f"{what} is not installed (apt-get install {package})")
    return found


@pytest.fixture(scope="module")
def browser() -> str:
    return _needed(find_chromium(), "chromium", "chromium")


@pytest.fixture(scope="module")
def pdftotext() -> str:
    return _needed(shutil.which("pdftotext"), "pdftotext", "poppler-utils")


def _main(*args: str) -> int:
    with pytest.raises(SystemExit) as done:
        main(list(args))
    code = done.value.code
    return code if isinstance(code, int) else 1


@pytest.fixture(scope="module")
def certificate(tmp_path_factory: pytest.TempPathFactory, browser: str) -> dict[str, Path]:
    """The demo run, reviewed and released, and its rebuilt certificate as HTML and PDF."""
    root = tmp_path_factory.mktemp("certificate")
    people = signers(root / "people")
    recipe, lot, _ = demo_paths("filter-disc")
    # disc 06 fails the porosity limit: the demo's verdict is its own (exit 1)
    code = _main("run", str(recipe), str(lot), "--out", str(root / "runs"), "--no-cache",
                 "--quiet", "--station", STATION, "--operator", "T. Demo")  # fmt: skip
    assert code == 1
    (run,) = [p for p in (root / "runs").iterdir() if p.is_dir()]
    for role, key, name in (
        ("reviewed", people["reviewer"], "Ann Reviewer"),
        ("released", people["releaser"], "Rui Leaser"),
    ):
        assert _main("approve", str(run), "--key", str(key), "--role", role, "--name", name) == 0
    trust = str(people["trust"])
    html, pdf = root / "certificate.html", root / "certificate.pdf"
    assert _main("report", str(run), "--trust", trust, "--out", str(html)) == 0
    assert _main("report", str(run), "--trust", trust, "--pdf", "--out", str(pdf)) == 0
    return {"run": run, "html": html, "pdf": pdf, "root": root}


class _Rows(HTMLParser):
    """The text of the elements with data-role and data-detail attributes, as rendered."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.found: dict[str, str] = {}
        self._open: list[tuple[str, str, list[str]]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        for key in ("data-role", "data-detail"):
            if key in a:
                self._open.append((tag, f"{key}={a[key]}", []))

    def handle_endtag(self, tag: str) -> None:
        if self._open and self._open[-1][0] == tag:
            _, key, text = self._open.pop()
            self.found[key] = "".join(text)

    def handle_data(self, data: str) -> None:
        for _, _, text in self._open:
            text.append(data)


def _chromium(browser: str, *args: str) -> subprocess.CompletedProcess[bytes]:
    with tempfile.TemporaryDirectory() as profile:
        done = subprocess.run(
            chromium_command(browser, Path(profile), *args),
            capture_output=True,
            timeout=120,
            stdin=subprocess.DEVNULL,
            check=False,
        )
    assert done.returncode == 0, done.stderr.decode(errors="replace")[-2000:]
    return done


def test_the_rendered_certificate_has_the_signature_block_and_the_lot_details(
    browser: str, certificate: dict[str, Path]
) -> None:
    dom = _chromium(browser, "--dump-dom", certificate["html"].resolve().as_uri()).stdout
    rows = _Rows()
    rows.feed(dom.decode("utf-8"))
    approvals = verify_run(certificate["run"]).approvals
    assert [a.role for a in approvals] == ["reviewed", "released"]
    for record, word in zip(approvals, ("Reviewed", "Released"), strict=True):
        row = rows.found[f"data-role={record.role}"]
        # printed name, meaning, date and time, key fingerprint; checked against the trust folder
        for shown in (record.name, word, record.time_utc, record.key, "signature verified"):
            assert shown in row, (shown, row)
    # the lot sheet beside the demo lot (demo_run/FD-2611.lot.yaml) and the options
    assert rows.found["data-detail=customer"] == "Invented Filter Customer (demo customer)"
    assert rows.found["data-detail=order"] == "PO-2611-0042"
    assert rows.found["data-detail=specification"].startswith("LFW-SPEC-07 rev B")
    assert rows.found["data-detail=operator"] == "T. Demo"
    assert rows.found["data-detail=lot"].startswith("FD-2611")


def test_a_screenshot_of_the_certificate_is_not_blank(
    browser: str, certificate: dict[str, Path]
) -> None:
    shot = certificate["root"] / "certificate.png"
    _chromium(
        browser,
        "--hide-scrollbars",
        "--window-size=1000,1400",
        f"--screenshot={shot}",
        certificate["html"].resolve().as_uri(),
    )
    with Image.open(shot) as im:
        assert im.size == (1000, 1400)
        gray = np.asarray(im.convert("L"), dtype=np.float64)
    assert gray.std() > 10 and (gray < 80).mean() > 0.005 and (gray > 200).mean() > 0.5
    keep = os.environ.get("LOTPROOF_KEEP_SCREENSHOT")
    if keep:  # for a person to look at
        shutil.copy(shot, keep)


def test_every_printed_page_has_its_number_and_the_lot(
    pdftotext: str, certificate: dict[str, Path]
) -> None:
    done = subprocess.run(
        [pdftotext, "-layout", str(certificate["pdf"]), "-"],
        capture_output=True,
        timeout=60,
        check=True,
    )
    pages = done.stdout.decode("utf-8").split("\f")
    if pages and not pages[-1].strip():
        pages.pop()
    total = len(pages)
    assert total >= 2  # the demo's certificate runs over several pages
    run_id = certificate["run"].name
    for number, text in enumerate(pages, 1):
        assert f"page {number} of {total}" in text, (number, text[-400:])
        assert "Lot FD-2611" in text, number
        assert run_id in re.sub(r"\s+", "", text), number
    # the signature block is on the first page: read it in reading order, not by layout
    done = subprocess.run(
        [pdftotext, "-f", "1", "-l", "1", str(certificate["pdf"]), "-"],
        capture_output=True,
        timeout=60,
        check=True,
    )
    first = " ".join(done.stdout.decode("utf-8").split())
    for shown in ("Review and release", "Ann Reviewer", "Rui Leaser", "Invented Filter Customer"):
        assert shown in first, shown
