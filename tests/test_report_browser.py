"""The report in a real browser: headless Chromium renders it (not blank) and prints it to PDF.

In CI (``CI`` set) a missing Chromium is a failure, not a skip: ``.ci/run`` installs
Debian's ``chromium`` package. On a developer's machine without it the tests skip.
"""

from __future__ import annotations

import os
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image

import lotproof.runner.cli.show  # noqa: F401  registers report and preview on the cli group
from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.show.pdf import chromium_command, find_chromium
from lotproof.runner.show.report import rebuild_report

RECIPE = """\
format: lotproof/1
name: spot-browser
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
    max: 0.5
"""


@pytest.fixture(scope="module")
def browser() -> str:
    found = find_chromium()
    if found is None:
        if os.environ.get("CI"):
            pytest.fail(
                "chromium is not installed; .ci/run installs Debian's chromium package in CI"
            )
        pytest.skip("chromium is not installed (apt-get install chromium)")
    return found


@pytest.fixture(scope="module")
def report_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("browser")
    lot = root / "lot"
    lot.mkdir()
    rng = np.random.default_rng(7)
    for i in range(2):
        image = np.full((96, 96), 30, np.uint8)
        for y, x in rng.integers(4, 88, size=(12, 2)):
            image[y : y + 4, x : x + 4] = 210
        tifffile.imwrite(lot / f"disc-{i:02d}.tif", image)
    recipe = root / "recipe.yaml"
    recipe.write_text(RECIPE)
    run = run_lot(recipe, lot, root / "runs").run_dir
    out, status = rebuild_report(run)
    assert status == "intact"
    return out


def test_screenshot_is_not_blank(browser: str, report_file: Path, tmp_path: Path) -> None:
    shot = tmp_path / "shot.png"
    with tempfile.TemporaryDirectory() as profile:
        command = chromium_command(
            browser,
            Path(profile),
            "--hide-scrollbars",
            "--window-size=1000,1400",
            f"--screenshot={shot}",
            report_file.resolve().as_uri(),
        )
        done = subprocess.run(
            command, capture_output=True, timeout=120, stdin=subprocess.DEVNULL, check=False
        )
    assert done.returncode == 0, done.stderr.decode(errors="replace")[-2000:]
    with Image.open(shot) as im:
        assert im.size == (1000, 1400)
        gray = np.asarray(im.convert("L"), dtype=np.float64)
    # a blank page is one colour; text, rules and pictures give dark pixels and spread
    assert gray.std() > 10
    assert (gray < 80).mean() > 0.005
    assert (gray > 200).mean() > 0.5
    # the lot verdict box stands in the top part of the page: a thick dark frame near the top
    top = gray[:700]
    assert ((top < 60).sum(axis=1) > 500).any()


def test_pdf_is_printed(browser: str, report_file: Path, tmp_path: Path) -> None:
    out = tmp_path / "report.pdf"
    with pytest.raises(SystemExit) as exit_info:
        main(
            [
                "report",
                str(report_file.parent / report_file.name.removesuffix("-report.html")),
                "--pdf",
                "--out",
                str(out),
            ]
        )
    assert exit_info.value.code == 0
    data = out.read_bytes()
    assert data.startswith(b"%PDF-")
    assert b"/Type /Page" in data or b"/Type/Page" in data
