"""Printing a report to PDF with headless Chromium (Debian's ``chromium`` package).

Chromium runs without a sandbox, a GPU, extensions or anything reached on the
network, in a throw-away profile. A PDF embeds its creation date: the HTML is the
reproducible artefact, the PDF a print of it.
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path

__all__ = ["CHROMIUM_NAMES", "PDF_TIMEOUT_S", "chromium_command", "find_chromium", "html_to_pdf"]

#: executables tried, in order, for headless printing
CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
#: seconds Chromium may take to print one report
PDF_TIMEOUT_S = 120


def find_chromium() -> str | None:
    """Path of a Chromium-family browser on ``PATH``, or None."""
    for name in CHROMIUM_NAMES:
        found = shutil.which(name)
        if found:
            return found
    return None


def chromium_command(browser: str, profile: Path, *extra: str) -> list[str]:
    """The headless Chromium command line: no sandbox, no GPU, nothing reached on the network."""
    return [
        browser,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--no-pdf-header-footer",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--disable-extensions",
        f"--user-data-dir={profile}",
        *extra,
    ]


def html_to_pdf(html_file: Path, pdf: Path, browser: str | None = None) -> None:
    """Print ``html_file`` to ``pdf`` with headless Chromium.

    Raises
    ------
    FileNotFoundError
        When no Chromium is installed.
    RuntimeError
        When Chromium ran but made no PDF.
    """
    browser = browser or find_chromium()
    if browser is None:
        raise FileNotFoundError("chromium")
    pdf = pdf.resolve()
    with tempfile.TemporaryDirectory(prefix="lotproof-chromium-") as profile:
        command = chromium_command(
            browser, Path(profile), f"--print-to-pdf={pdf}", html_file.resolve().as_uri()
        )
        try:
            done = subprocess.run(
                command,
                capture_output=True,
                timeout=PDF_TIMEOUT_S,
                check=False,
                stdin=subprocess.DEVNULL,
            )
        except subprocess.TimeoutExpired:
            raise RuntimeError(f"chromium did not finish within {PDF_TIMEOUT_S} s") from None
    if done.returncode != 0 or not pdf.is_file() or pdf.stat().st_size == 0:
        tail = done.stderr.decode("utf-8", "replace").strip().splitlines()[-1:] or ["no message"]
        raise RuntimeError(f"chromium exited with {done.returncode}: {tail[0]}")
