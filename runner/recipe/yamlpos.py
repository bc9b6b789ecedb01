"""Strict YAML reading with the position of every key and value.

Recipes are read with YAML 1.2 core-schema scalars (``no``, ``off``, ``010``,
``12:30`` stay what they look like; ``1e3`` is a number), duplicate keys are
errors, and anchors, aliases, explicit tags and multi-document files are refused.
Aliases are refused because they allow exponential expansion and because they
would give one value several positions.

The result is plain Python data (dict, list, str, int, float, bool, None) and a
table from each path (a tuple of keys and list indexes) to the position of the
key and of the value, so that an error found later, in the recipe's models, can
point at the line and column it concerns. Every scalar value also has its span,
the character offsets where its text begins and ends (quotes included), so that a
tool can change one value of a file and keep every other byte of it.
"""

from __future__ import annotations

import bisect
import math
import re
from dataclasses import dataclass, field
from typing import Any, cast

import yaml
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

__all__ = ["MAX_RECIPE_BYTES", "LoadedYaml", "Position", "YamlProblem", "load_yaml"]

#: a recipe larger than this is refused before it is parsed
MAX_RECIPE_BYTES = 1_000_000
#: nesting deeper than this is refused (a recipe needs five levels)
MAX_DEPTH = 64

_TAG_STR = "tag:yaml.org,2002:str"
_TAG_INT = "tag:yaml.org,2002:int"
_TAG_FLOAT = "tag:yaml.org,2002:float"
_TAG_BOOL = "tag:yaml.org,2002:bool"
_TAG_NULL = "tag:yaml.org,2002:null"
_TAG_MAP = "tag:yaml.org,2002:map"
_TAG_SEQ = "tag:yaml.org,2002:seq"


@dataclass(frozen=True)
class Position:
    """1-based line and column."""

    line: int
    column: int


@dataclass
class YamlProblem:
    position: Position
    what: str


@dataclass
class LoadedYaml:
    data: Any
    #: path -> (position of the key, position of the value)
    positions: dict[tuple[Any, ...], tuple[Position, Position]] = field(default_factory=dict)
    problems: list[YamlProblem] = field(default_factory=list)
    #: path of a scalar value -> (start, end) offsets of its text in the parsed string
    spans: dict[tuple[Any, ...], tuple[int, int]] = field(default_factory=dict)

    def position(self, path: tuple[Any, ...], *, key: bool = False) -> Position:
        """The position of ``path``, or of its longest prefix that has one."""
        for n in range(len(path), -1, -1):
            hit = self.positions.get(tuple(path[:n]))
            if hit is not None:
                return hit[0] if key and n == len(path) else hit[1]
        return Position(1, 1)


def _start(event: yaml.Event) -> yaml.Mark | None:
    """Where ``event`` starts: the pure-Python parser of SafeLoader makes only ``yaml.Mark``."""
    return cast("yaml.Mark | None", event.start_mark)


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader with YAML 1.2 core-schema implicit scalars and no aliases."""

    def compose_node(self, parent: Node | None, index: Any) -> Node | None:
        # types-PyYAML leaves Parser.peek_event unannotated; it returns the next event
        event: yaml.Event = self.peek_event()  # type: ignore[no-untyped-call]
        if isinstance(event, yaml.AliasEvent):
            raise yaml.MarkedYAMLError(
                problem="aliases (*name) are not allowed in recipes; write the value out",
                problem_mark=_start(event),
            )
        if getattr(event, "anchor", None) is not None:
            raise yaml.MarkedYAMLError(
                problem="anchors (&name) are not allowed in recipes",
                problem_mark=_start(event),
            )
        self._depth = getattr(self, "_depth", 0) + 1
        try:
            if self._depth > MAX_DEPTH:
                raise yaml.MarkedYAMLError(
                    problem=f"nesting deeper than {MAX_DEPTH} levels is not allowed",
                    problem_mark=_start(event),
                )
            node = super().compose_node(parent, index)
        finally:
            self._depth -= 1
        # ``!!str 1`` or ``!!int '1'`` resolve to core tags; remember that a tag was
        # written so that every explicit tag is refused, not only the unknown ones.
        tag = getattr(event, "tag", None)
        if tag is not None and node is not None:
            node.explicit_tag = tag  # type: ignore[attr-defined]
        return node


_StrictLoader.yaml_implicit_resolvers = {}
_StrictLoader.add_implicit_resolver(
    _TAG_BOOL, re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"), list("tTfF")
)
_StrictLoader.add_implicit_resolver(
    _TAG_INT, re.compile(r"^(?:[-+]?[0-9]+|0o[0-7]+|0x[0-9a-fA-F]+)$"), list("-+0123456789")
)
_StrictLoader.add_implicit_resolver(
    _TAG_FLOAT,
    re.compile(
        r"^(?:[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?"
        r"|[-+]?\.(?:inf|Inf|INF)|\.(?:nan|NaN|NAN))$"
    ),
    list("-+0123456789."),
)
_StrictLoader.add_implicit_resolver(
    _TAG_NULL, re.compile(r"^(?:~|null|Null|NULL|)$"), ["~", "n", "N", ""]
)


class _Lines:
    """Line and column of a character offset, counting only ``\\n`` as a line break.

    PyYAML also breaks lines at ``\\r``, NEL (U+0085) and U+2028/U+2029; editors,
    ``grep -n`` and ``sed -n`` do not, so its own line numbers would point at the
    wrong line of a file that holds one of those characters.
    """

    def __init__(self, text: str):
        self.starts = [0] + [m.end() for m in re.finditer("\n", text)]

    def at(self, offset: int) -> Position:
        line = bisect.bisect_right(self.starts, offset) - 1
        return Position(line + 1, offset - self.starts[line] + 1)

    def mark(self, mark: Any) -> Position:
        return self.at(mark.index)


def _scalar(node: ScalarNode) -> Any:
    value = node.value
    tag = node.tag
    if tag == _TAG_STR:
        return value
    if tag == _TAG_NULL:
        return None
    if tag == _TAG_BOOL:
        return value.lower() == "true"
    if tag == _TAG_INT:
        if value.startswith("0o"):
            return int(value[2:], 8)
        if value.startswith("0x"):
            return int(value[2:], 16)
        return int(value)
    if tag == _TAG_FLOAT:
        lowered = value.lower()
        if lowered.endswith(".inf"):
            return -math.inf if lowered.startswith("-") else math.inf
        if lowered == ".nan":
            return math.nan
        return float(value)
    raise _TagRefused(tag)


class _TagRefused(Exception):
    def __init__(self, tag: str):
        self.tag = tag


def _build(
    node: Node, path: tuple[Any, ...], key_pos: Position, out: LoadedYaml, lines: _Lines
) -> Any:
    # A problem with a whole mapping (a missing key, a rule across keys) is shown at
    # the mapping's own key, not at its first entry.
    value_pos = key_pos if isinstance(node, MappingNode) and path else lines.mark(node.start_mark)
    out.positions[path] = (key_pos, value_pos)
    written_tag = getattr(node, "explicit_tag", None)
    if written_tag is not None:
        out.problems.append(
            YamlProblem(lines.mark(node.start_mark), f"explicit tag {written_tag!r} is not allowed")
        )
        return None
    if isinstance(node, ScalarNode):
        out.spans[path] = (node.start_mark.index, node.end_mark.index)
        try:
            return _scalar(node)
        except _TagRefused as refused:
            out.problems.append(
                YamlProblem(
                    lines.mark(node.start_mark), f"explicit tag {refused.tag!r} is not allowed"
                )
            )
            return None
    if node.tag not in (_TAG_MAP, _TAG_SEQ):
        out.problems.append(
            YamlProblem(lines.mark(node.start_mark), f"explicit tag {node.tag!r} is not allowed")
        )
        return None
    if isinstance(node, SequenceNode):
        return [
            _build(item, path + (i,), lines.mark(item.start_mark), out, lines)
            for i, item in enumerate(node.value)
        ]
    assert isinstance(node, MappingNode)
    result: dict[Any, Any] = {}
    first_seen: dict[Any, Position] = {}
    for key_node, value_node in node.value:
        kpos = lines.mark(key_node.start_mark)
        if not isinstance(key_node, ScalarNode):
            out.problems.append(
                YamlProblem(kpos, "a key must be plain text, not a list or mapping")
            )
            continue
        key_tag = getattr(key_node, "explicit_tag", None)
        if key_tag is not None:
            out.problems.append(YamlProblem(kpos, f"explicit tag {key_tag!r} is not allowed"))
            continue
        try:
            key = _scalar(key_node)
        except _TagRefused as refused:
            out.problems.append(YamlProblem(kpos, f"explicit tag {refused.tag!r} is not allowed"))
            continue
        if not isinstance(key, str):
            out.problems.append(
                YamlProblem(kpos, f"a key must be text (got {key_node.value!r}); quote it")
            )
            continue
        if key in first_seen:
            out.problems.append(
                YamlProblem(
                    kpos,
                    f"duplicate key {key!r} (first at line {first_seen[key].line}); "
                    "YAML keeps only one of them",
                )
            )
            continue
        first_seen[key] = kpos
        result[key] = _build(value_node, path + (key,), kpos, out, lines)
    return result


def _reader_problem(err: yaml.reader.ReaderError) -> str:
    character = err.character
    code = ord(character) if isinstance(character, str) else int(character)
    return f"control character U+{code:04X} is not allowed in YAML text; remove it"


def load_yaml(text: str, document: str = "recipe") -> LoadedYaml:
    """Parse ``text`` strictly; syntax problems are returned, never raised.

    On a syntax error ``data`` is ``None`` and ``problems`` holds one entry with
    the position PyYAML reported. ``document`` names what the text is in messages
    (``recipe``, ``lot sheet``).
    """
    out = LoadedYaml(data=None)
    lines = _Lines(text)
    try:
        # the reader refuses control characters as soon as it is made
        loader = _StrictLoader(text)
    except yaml.reader.ReaderError as err:
        out.problems.append(YamlProblem(lines.at(err.position), _reader_problem(err)))
        return out
    try:
        node = loader.get_single_node()
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        text_of_err = str(err)
        if "expected a single document" in text_of_err:
            what = f"a {document} is one YAML document; remove the '---' separator and what follows"
        elif "'\\t'" in text_of_err:
            what = "tab characters cannot indent YAML; use spaces"
        elif err.context and err.problem:
            what = f"{err.context}, {err.problem}"
            start = err.context_mark
            if mark is not None and start is not None:
                began, found = lines.mark(start), lines.mark(mark)
                if began.line != found.line:
                    # an unclosed quote or bracket shows where the text ends: say where it began
                    what += f" (it began at line {began.line}, column {began.column})"
        else:
            what = err.problem or "invalid YAML"
        out.problems.append(YamlProblem(lines.mark(mark) if mark else Position(1, 1), what))
        return out
    except yaml.reader.ReaderError as err:
        out.problems.append(YamlProblem(lines.at(err.position), _reader_problem(err)))
        return out
    except yaml.YAMLError as err:
        out.problems.append(YamlProblem(Position(1, 1), f"invalid YAML: {err}"))
        return out
    except RecursionError:
        out.problems.append(YamlProblem(Position(1, 1), "the document is nested too deeply"))
        return out
    finally:
        loader.dispose()
    if node is None:
        out.problems.append(YamlProblem(Position(1, 1), f"the {document} is empty"))
        return out
    out.data = _build(node, (), Position(1, 1), out, lines)
    if out.data is None and not out.problems:
        out.problems.append(
            YamlProblem(lines.mark(node.start_mark), f"the {document} is empty (null)")
        )
    return out
