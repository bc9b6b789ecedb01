"""lotproof's errors and exit codes: every exit code of every command is defined here.

Every error carries its pieces as attributes (file, line, column, where, what) so
the CLI, the ``--json`` output and the tests all read the same thing.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "EXIT_BAD_INPUT",
    "EXIT_INTEGRITY",
    "EXIT_INTERNAL",
    "EXIT_INTERRUPTED",
    "EXIT_INVALID",
    "EXIT_LIMIT_FAILED",
    "EXIT_NO_PDF",
    "EXIT_OK",
    "InputError",
    "LotproofError",
    "Problem",
    "RecipeError",
    "RunFolderError",
]

#: every limit passed / the command succeeded
EXIT_OK = 0
#: a limit failed
EXIT_LIMIT_FAILED = 1
#: the recipe or the command line is invalid; nothing ran
EXIT_INVALID = 2
#: bad input data, or the lot is incomplete (an image could not be analysed)
EXIT_BAD_INPUT = 3
#: integrity failure (an altered record, a rerun that differs)
EXIT_INTEGRITY = 4
#: a bug in lotproof itself (never used for bad data)
EXIT_INTERNAL = 70
#: interrupted (Ctrl-C)
EXIT_INTERRUPTED = 130
#: ``report --pdf`` could not make the PDF (no Chromium, or it failed); the HTML is the
#: reproducible artefact either way
EXIT_NO_PDF = EXIT_BAD_INPUT


class LotproofError(Exception):
    """Base of lotproof's errors; ``exit_code`` says how the CLI ends."""

    exit_code = EXIT_INVALID


@dataclass(frozen=True)
class Problem:
    """One problem found in a recipe, with its position (1-based line and column)."""

    file: str
    line: int
    column: int
    where: str
    what: str

    def __str__(self) -> str:
        where = f"{self.where}: " if self.where else ""
        return f"{self.file}:{self.line}:{self.column}: {where}{self.what}"

    def as_dict(self) -> dict[str, object]:
        return {
            "file": self.file,
            "line": self.line,
            "column": self.column,
            "where": self.where,
            "what": self.what,
        }


class RecipeError(LotproofError, ValueError):
    """A recipe is invalid; ``problems`` lists every problem found, in file order."""

    exit_code = EXIT_INVALID

    def __init__(self, problems: list[Problem]):
        self.problems = sorted(problems, key=lambda p: (p.line, p.column, p.where, p.what))
        super().__init__("\n".join(str(p) for p in self.problems))


class InputError(LotproofError, ValueError):
    """A lot or an input file cannot be used."""

    exit_code = EXIT_BAD_INPUT


class RunFolderError(LotproofError, OSError):
    """The run folder cannot be created or written."""

    exit_code = EXIT_BAD_INPUT
