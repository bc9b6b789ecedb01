"""Recipe problems, positioned: pydantic's errors turned into ``FILE:LINE:COL`` messages.

:class:`ProblemCollector` gathers every problem of one recipe file so that they are
all reported at once; the loader, the graph checks and the limit checks add to it.
"""

from __future__ import annotations

import difflib
import re
from typing import Any

from pydantic import ValidationError

from lotproof.runner.errors import Problem
from lotproof.runner.recipe.yamlpos import LoadedYaml

__all__ = ["ProblemCollector", "describe", "suggest", "where_text"]


def _quoted(options: str) -> list[str]:
    return re.findall(r"'([^']*)'", options)


def suggest(word: object, options: list[str]) -> str:
    """`` (did you mean 'x'?)`` for the option closest to ``word``, or nothing."""
    if not isinstance(word, str) or not options:
        return ""
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def where_text(path: tuple[Any, ...]) -> str:
    """A path in the recipe as written in messages: ``steps.clean.radius``."""
    return ".".join(str(p) for p in path)


class ProblemCollector:
    """Turns pydantic errors into positioned :class:`Problem` objects."""

    def __init__(self, file: str, loaded: LoadedYaml):
        self.file = file
        self.loaded = loaded
        self.problems: list[Problem] = []

    def add(self, path: tuple[Any, ...], what: str, *, key: bool = False) -> None:
        pos = self.loaded.position(path, key=key)
        self.problems.append(Problem(self.file, pos.line, pos.column, where_text(path), what))

    def add_validation(
        self, err: ValidationError, prefix: tuple[Any, ...], fields: list[str], data: Any
    ) -> None:
        seen: set[tuple[Any, ...]] = set()
        for e in err.errors(include_url=False):
            # Unions put the member's tag into loc (``function-plain[...]``, ``literal[...]``);
            # positions and messages are about the field, so drop the tag and keep the
            # first member's complaint only.
            loc = tuple(p for p in e["loc"] if not (isinstance(p, str) and "[" in p))
            if loc in seen and len(loc) != len(e["loc"]):
                continue
            seen.add(loc)
            path = prefix + loc
            kind = e["type"]
            got = e.get("input")
            if kind == "extra_forbidden":
                key = loc[-1] if loc else "?"
                self.add(path, f"unknown key {key!r}{suggest(key, fields)}", key=True)
            elif kind == "missing":
                self.add(path[:-1], f"missing required key {loc[-1]!r}")
            elif kind == "literal_error":
                options = _quoted(str(e.get("ctx", {}).get("expected", "")))
                listed = ", ".join(repr(o) for o in options)
                self.add(path, f"{got!r} is not one of {listed}{suggest(got, options)}")
            elif kind == "string_pattern_mismatch" and loc and loc[-1] == "value":
                self.add(path, f"{got!r} must name a step's value as STEP.NAME")
            elif kind == "string_pattern_mismatch" and path == ("name",):
                self.add(path, f"{got!r} must be a slug: lower-case letters, digits and '-'")
            elif kind == "string_pattern_mismatch":
                self.add(
                    path,
                    f"{got!r} is not a valid name (letters, digits, '-' and '_', starting "
                    "with a letter; no dots)",
                )
            elif kind in ("dict_type", "model_type", "model_attributes_type"):
                self.add(path, f"a mapping (key: value lines) belongs here, got {describe(got)}")
            elif kind == "list_type":
                self.add(path, f"a list belongs here, got {describe(got)}")
            elif kind == "value_error":
                msg = str(e["msg"]).removeprefix("Value error, ")
                self.add(path, msg)
            elif kind.startswith("quantity_"):
                self.add(path, str(e["msg"]))
            elif kind in ("greater_than_equal", "greater_than", "less_than_equal", "less_than"):
                sign = {
                    "greater_than_equal": ">=",
                    "greater_than": ">",
                    "less_than_equal": "<=",
                    "less_than": "<",
                }[kind]
                bound = next(iter(e.get("ctx", {}).values()), "?")
                self.add(path, f"must be {sign} {bound} (got {got!r})")
            elif kind in ("too_short", "too_long") and isinstance(got, (list, dict)):
                self.add(path, str(e["msg"]))
            elif kind in ("int_parsing", "int_type", "int_from_float"):
                self.add(path, f"a whole number belongs here (got {got!r})")
            elif kind in ("float_parsing", "float_type"):
                self.add(path, f"a number belongs here (got {got!r})")
            elif kind in ("bool_parsing", "bool_type"):
                self.add(path, f"true or false belongs here (got {got!r})")
            elif kind in ("string_type",):
                self.add(path, f"text belongs here (got {describe(got)})")
            else:
                self.add(path, f"{e['msg']} (got {got!r})")


def describe(value: Any) -> str:
    """What a value is, in words, for a message: ``a mapping``, ``a list``, ``'text'``."""
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    if value is None:
        return "nothing"
    return repr(value)
