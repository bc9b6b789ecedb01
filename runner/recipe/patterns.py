"""Input globs of a recipe: what a pattern may be, and how it matches a lot's paths.

A pattern is relative to the lot folder and never leaves it; wildcards never
match across ``/`` (``**/`` matches folders) and never match ``..``.
"""

from __future__ import annotations

import re
from pathlib import PurePosixPath

__all__ = ["check_pattern", "glob_to_regex"]


def glob_to_regex(pattern: str) -> re.Pattern[str]:
    """The regular expression of ``pattern`` over ``/``-separated paths; groups capture the wildcards."""
    out = []
    i = 0
    while i < len(pattern):
        c = pattern[i]
        if pattern.startswith("**/", i):
            out.append("((?:[^/]*/)*)")
            i += 3
            continue
        if c == "*":
            out.append("([^/]*)")
        elif c == "?":
            out.append("([^/])")
        elif c == "[":
            end = pattern.find("]", i + 1)
            if end == -1:
                out.append(re.escape(c))
            else:
                body = pattern[i + 1 : end].replace("\\", "\\\\")
                if body.startswith("!"):
                    body = "^" + body[1:]
                out.append(f"([{body}])")
                i = end
        else:
            out.append(re.escape(c))
        i += 1
    return re.compile("^" + "".join(out) + "$")


def check_pattern(pattern: str) -> str | None:
    """Why ``pattern`` may not be used as an input glob, or ``None`` when it may."""
    posix = PurePosixPath(pattern.replace("\\", "/"))
    if posix.is_absolute() or re.match(r"^[A-Za-z]:", pattern):
        return "an input glob is relative to the lot folder; absolute paths are refused"
    if ".." in posix.parts:
        return "an input glob may not leave the lot folder ('..' is refused)"
    if pattern.startswith("~"):
        return "an input glob is relative to the lot folder; '~' (a home folder) is refused"
    if any(ord(c) < 32 or c == "\x7f" for c in pattern):
        return "an input glob may not hold control characters (NUL, newline, ...)"
    if not pattern.strip():
        return "an input glob may not be empty"
    return None
