"""Reading a run folder's files: the one reader behind verify, rerun, report, export and compare.

A run folder is evidence and is never changed by reading it. :class:`RunFolder`
reads its files by their names in :mod:`lotproof.runner.record.layout`, only
regular files (a pipe or device under a run file's name is refused, never waited
on), and turns every failure into one error that names the file and what went
wrong. The error's class is the caller's: ``report`` says "not a run folder"
with exit 2, ``compare`` with exit 3, and so on.

The reader judges nothing: whether the files are the ones the ledger sealed is
:func:`lotproof.runner.record.verify.verify_run`'s question.
"""

from __future__ import annotations

import builtins
import csv
import io
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.files import NotARegularFile, read_file
from lotproof.runner.record.layout import (
    LEDGER_FILE,
    RECIPE_FILE,
    VERDICTS_FILE,
    figure_path,
    image_folders,
)
from lotproof.runner.record.ledger import LedgerError, LedgerLine, parse_ledger

__all__ = ["RunFolder", "RunFolderReadError"]


class RunFolderReadError(LotproofError, ValueError):
    """A run folder's file is missing or cannot be read (exit 2: nothing was done)."""

    exit_code = EXIT_INVALID


class RunFolder:
    """The files of one run folder, read on demand.

    Parameters
    ----------
    path
        The run folder.
    error
        The error class raised for a missing or unreadable file (a
        :class:`~lotproof.runner.errors.LotproofError` taking one message).
    """

    def __init__(self, path: Path, *, error: type[LotproofError] = RunFolderReadError):
        self.path = Path(path)
        self._error = error
        self._folders: dict[str, str] | None = None

    def exists(self, name: str) -> bool:
        """Whether the run folder has a file ``name`` (a POSIX path inside it)."""
        return (self.path / name).is_file()

    def bytes(self, name: str, *, required: bool = True) -> bytes | None:
        """The bytes of ``name``; None when it is missing and not ``required``."""
        path = self.path / name
        try:
            return read_file(path)
        except FileNotFoundError:
            if required:
                raise self._error(f"{path}: missing; is {self.path} a run folder?") from None
            return None
        except NotARegularFile as err:
            raise self._error(f"{path}: {err.strerror}; run files are regular files") from None
        except OSError as err:
            raise self._error(f"{path}: cannot be read ({err.strerror})") from None

    def text(self, name: str, *, required: bool = True) -> str | None:
        """The UTF-8 text of ``name``; None when it is missing and not ``required``."""
        data = self.bytes(name, required=required)
        if data is None:
            return None
        try:
            return data.decode("utf-8")
        except UnicodeDecodeError:
            raise self._error(f"{self.path / name}: not UTF-8 text") from None

    def json(self, name: str, *, required: bool = True) -> Any:
        """The JSON document in ``name``; ``{}`` when it is missing and not ``required``."""
        text = self.text(name, required=required)
        if text is None:
            return {}
        try:
            return json.loads(text)
        except ValueError as err:
            raise self._error(f"{self.path / name}: cannot be read as JSON ({err})") from None

    def csv(self, name: str, *, required: bool = False) -> tuple[list[str], list[list[str]]]:
        """(header, rows) of the CSV file ``name``; empty when it is missing and not ``required``."""
        text = self.text(name, required=required)
        if text is None:
            return [], []
        rows = list(csv.reader(io.StringIO(text, newline="")))
        return (rows[0], rows[1:]) if rows else ([], [])

    def csv_rows(self, name: str) -> Iterator[list[str]]:
        """The rows of the CSV file ``name``, header first, one at a time (objects.csv can
        hold millions of rows); nothing when it is missing."""
        path = self.path / name
        try:
            handle = path.open(encoding="utf-8", newline="")
        except FileNotFoundError:
            return
        except OSError as err:
            raise self._error(f"{path}: cannot be read ({err.strerror})") from None
        with handle:
            if not path.is_file():
                raise self._error(f"{path}: not a regular file; run files are regular files")
            try:
                yield from csv.reader(handle)
            except (OSError, UnicodeDecodeError, csv.Error) as err:
                raise self._error(f"{path}: cannot be read as CSV ({err})") from None

    # from here on in the class body, ``bytes`` names the method above; the type is builtins.bytes
    def recipe(self) -> builtins.bytes:
        """The exact bytes of the recipe as run (``recipe.yaml``)."""
        data = self.bytes(RECIPE_FILE)
        assert data is not None  # required
        return data

    def verdicts(self) -> dict[str, Any]:
        """``verdicts.json``, which every finished run has; an error names a folder that is no run."""
        if not self.exists(VERDICTS_FILE):
            raise self._error(f"{self.path}: not a run folder (no {VERDICTS_FILE})")
        document = self.json(VERDICTS_FILE)
        if not isinstance(document, dict):
            raise self._error(f"{self.path / VERDICTS_FILE}: not a verdicts document")
        return document

    def figure(self, image_id: str, name: str) -> builtins.bytes | None:
        """The PNG bytes of an image's figure (``thumbnail`` or ``overlay``), or None."""
        relative = figure_path(image_id, name, self.image_folders())
        return self.bytes(relative, required=False) if self.exists(relative) else None

    def image_folders(self) -> dict[str, str]:
        """The name of each image inside this run folder, from the ids ``verdicts.json`` lists
        (the same function of the lot's ids that named them when the run was written)."""
        if self._folders is None:
            ids = self.verdicts().get("image_verdicts", {}) if self.exists(VERDICTS_FILE) else {}
            self._folders = image_folders(ids)
        return self._folders

    def ledger_lines(self, problems: list[str] | None = None) -> list[LedgerLine]:
        """The ledger's lines, checked for form and chain; what fails goes to ``problems``.

        A missing ledger gives no lines (and says so in ``problems``).
        """
        found = [] if problems is None else problems
        data = self.bytes(LEDGER_FILE, required=False)
        if data is None:
            found.append(f"{LEDGER_FILE}: missing; no record to verify")
            return []
        return parse_ledger(data, found)

    def ledger_events(self) -> list[dict[str, Any]]:
        """The events of every ledger line that parses, chain unchecked: for showing a record
        in whatever state (a run still being written, or one found altered), never for
        judging it."""
        return [line.event for line in self.ledger_lines() if line.event is not None]

    def events(self) -> list[dict[str, Any]]:
        """The events of the ledger of a finished run, after checking its chain.

        Output files are not checked here; that is
        :func:`~lotproof.runner.record.verify.verify_run`'s work.

        Raises
        ------
        LedgerError
            When the ledger is missing or unreadable, its chain is broken, or the run
            never finished (no ``run-end`` as the last event): an integrity failure.
        """
        path = self.path / LEDGER_FILE
        try:
            data = read_file(path)
        except FileNotFoundError:
            raise LedgerError(
                f"{path}: no ledger; not a run folder, or the run never started"
            ) from None
        except OSError as err:
            raise LedgerError(f"{path}: cannot read ({err.strerror})") from None
        problems: list[str] = []
        lines = parse_ledger(data, problems)
        if problems:
            raise LedgerError(f"{path}: {problems[0]}")
        events = [line.event for line in lines if line.event is not None]
        if not events or events[-1].get("type") != "run-end":
            raise LedgerError(f"{path}: the run never finished (no run-end event)")
        return events
