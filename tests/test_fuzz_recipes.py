"""Generated recipes: the loader answers with a Recipe or a RecipeError, never anything else.

Property (common practice for parsers, no source): for any bytes at all,
``parse_recipe`` either returns a :class:`Recipe` or raises :class:`RecipeError`
whose every problem has a position inside the file. No other exception, no hang
on nesting or aliases. Inputs: random bytes, random text built from YAML's own
punctuation, random nested data dumped as YAML, and mutations (by bytes and by
structure) of a valid recipe.
"""

from __future__ import annotations

import copy
import os
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from lotproof.runner.errors import RecipeError
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.model import Recipe

VALID = """\
format: lotproof/1
name: fuzz-test
revision: 3
summary: pores of a polished section
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background
    to: section
    features: dark
    radius: 10 um
  pores:
    apply: threshold
    to: level
    method: otsu
  clean:
    apply: open
    to: pores
    footprint: disk
    radius: 1 um
  stats:
    apply: measure
    to: clean
limits:
  porosity:
    value: stats.area_fraction
    max: 0.2
  largest:
    value: stats.ecd_max
    max: 60 um
  lot-porosity:
    value: stats.area_fraction
    over: lot-mean
    range: [0.1, 0.16]
"""

#: LOTPROOF_FUZZ_EXAMPLES=5000 for a longer search on a developer's machine
FUZZ = settings(
    max_examples=int(os.environ.get("LOTPROOF_FUZZ_EXAMPLES", "150")),
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)


def _answer(raw: bytes) -> Recipe | RecipeError:
    """parse_recipe's answer; any other exception fails the test by propagating."""
    try:
        return parse_recipe(raw, "fuzz.yaml")
    except RecipeError as err:
        lines = raw.count(b"\n") + 2
        assert err.problems, "a RecipeError without problems"
        for problem in err.problems:
            assert problem.file == "fuzz.yaml"
            assert 1 <= problem.line <= lines, problem
            assert problem.column >= 1, problem
            assert problem.what, problem
        str(err)  # the message itself must be printable
        return err


@pytest.mark.parametrize("apply", ["[]", "{}", "[threshold]"])
def test_a_step_kind_that_is_a_list_or_mapping_is_a_recipe_error(apply: str) -> None:
    text = VALID.replace("apply: threshold", f"apply: {apply}")
    with pytest.raises(RecipeError) as err:
        parse_recipe(text.encode(), "fuzz.yaml")
    assert [(p.line, p.where) for p in err.value.problems] == [(15, "steps.pores.apply")]


def test_the_valid_recipe_parses() -> None:
    recipe = parse_recipe(VALID.encode(), "fuzz.yaml")
    assert recipe.order == ("level", "pores", "clean", "stats")


@pytest.mark.parametrize("text", ["null\n", "~\n", "null\n...\n", "--- null\n"])
def test_a_null_document_is_an_empty_recipe(text: str) -> None:
    # found by test_generated_documents: a RecipeError with no problem in it
    with pytest.raises(RecipeError) as err:
        parse_recipe(text.encode(), "fuzz.yaml")
    assert [(p.line, p.what) for p in err.value.problems] == [(1, "the recipe is empty (null)")]


@pytest.mark.parametrize("breaker", ["\x85", "\u2028", "\u2029", "\r"])
def test_lines_are_counted_as_editors_count_them(breaker: str) -> None:
    # found by test_random_yaml_punctuation: PyYAML also breaks lines at NEL, U+2028,
    # U+2029 and a lone CR, so its line numbers pointed below the line meant
    summary = "summary: pores of a polished section"
    text = (
        VALID.replace(summary, f'summary: "pores{breaker}of a section"')
        + "  bad:\n    value: x\n    max: 1\n"
    )
    with pytest.raises(RecipeError) as err:
        parse_recipe(text.encode(), "fuzz.yaml")
    rows = text.split("\n")
    (problem,) = err.value.problems
    assert rows[problem.line - 1].strip() == "value: x"
    assert problem.column == rows[problem.line - 1].index("x") + 1


# ---------------------------------------------------------------- raw input

YAML_PIECES = [
    ":",
    " ",
    "  ",
    "\n",
    "\t",
    "-",
    "- ",
    "[",
    "]",
    "{",
    "}",
    ",",
    "&a",
    "*a",
    "!",
    "!!",
    "!!python/object:os.system",
    "|",
    ">",
    "'",
    '"',
    "#",
    "%YAML 1.2\n",
    "---\n",
    "...\n",
    "? ",
    "@",
    "`",
    "\\",
    "\x00",
    "\x85",
    "\ufeff",
    "\u2028",
    "é",
    "µm",
    "no",
    "010",
    "1e3",
    "12:30",
    ".nan",
    ".inf",
    "~",
    "null",
    "true",
    "format",
    "lotproof/1",
    "steps",
    "apply",
    "to",
    "limits",
    "value",
    "max",
    "radius",
    "10 um",
    "1e999 um",
    "px",
]


@FUZZ
@given(st.binary(max_size=400))
def test_random_bytes(raw: bytes) -> None:
    _answer(raw)


@FUZZ
@given(st.lists(st.sampled_from(YAML_PIECES) | st.text(max_size=6), max_size=60))
def test_random_yaml_punctuation(pieces: list[str]) -> None:
    _answer("".join(pieces).encode("utf-8", errors="surrogatepass"))


# ---------------------------------------------------------------- generated documents

scalars = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=12)
    | st.sampled_from(
        [
            "10 um",
            "3 px",
            "-1 um",
            "0 px",
            "20 um2",
            "stats.count",
            "*.tif",
            "../*.tif",
            "/etc/passwd",
            "otsu",
            "lotproof/1",
            "from-image",
            "lot-mean",
        ]
    )
)
keys = st.text(max_size=10) | st.sampled_from(
    [
        "format",
        "name",
        "revision",
        "pixel_size",
        "inputs",
        "steps",
        "limits",
        "apply",
        "to",
        "keep",
        "radius",
        "method",
        "value",
        "max",
        "min",
        "range",
        "over",
        "features",
    ]
)
documents = st.recursive(
    scalars,
    lambda children: st.lists(children, max_size=5) | st.dictionaries(keys, children, max_size=6),
    max_leaves=40,
)


@FUZZ
@given(documents)
def test_generated_documents(document: Any) -> None:
    text = yaml.safe_dump(document, allow_unicode=True, default_flow_style=None)
    _answer(text.encode("utf-8", errors="surrogatepass"))


@FUZZ
@given(st.dictionaries(keys, documents, max_size=8))
def test_generated_top_level_mappings(document: dict[str, Any]) -> None:
    text = yaml.safe_dump(document, allow_unicode=True, sort_keys=False)
    _answer(text.encode("utf-8", errors="surrogatepass"))


# ---------------------------------------------------------------- mutations of a valid recipe

BASE_DATA = yaml.safe_load(VALID)


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out = [prefix]
    if isinstance(node, dict):
        for key, value in node.items():
            out += _paths(value, prefix + (key,))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            out += _paths(value, prefix + (i,))
    return out


PATHS = [p for p in _paths(BASE_DATA) if p]


@FUZZ
@given(
    st.lists(
        st.tuples(st.sampled_from(PATHS), st.sampled_from(["replace", "delete"]), documents),
        min_size=1,
        max_size=4,
    )
)
def test_structural_mutations(edits: list[tuple[tuple[Any, ...], str, Any]]) -> None:
    data = copy.deepcopy(BASE_DATA)
    for path, how, value in edits:
        parent: Any = data
        try:
            for part in path[:-1]:
                parent = parent[part]
            if how == "delete":
                del parent[path[-1]]
            else:
                parent[path[-1]] = value
        except (KeyError, IndexError, TypeError):
            continue  # an earlier edit removed or replaced this path
    text = yaml.safe_dump(data, allow_unicode=True, sort_keys=False)
    _answer(text.encode("utf-8", errors="surrogatepass"))


@FUZZ
@given(
    st.lists(
        st.tuples(
            st.integers(min_value=0, max_value=len(VALID)),
            st.integers(min_value=0, max_value=8),
            st.sampled_from(YAML_PIECES) | st.text(max_size=4),
        ),
        min_size=1,
        max_size=6,
    )
)
def test_text_mutations(edits: list[tuple[int, int, str]]) -> None:
    text = VALID
    for at, cut, insert in edits:
        at = min(at, len(text))
        text = text[:at] + insert + text[at + cut :]
    _answer(text.encode("utf-8", errors="surrogatepass"))


@FUZZ
@given(
    st.lists(st.integers(min_value=0, max_value=VALID.count("\n") - 1), min_size=1, max_size=6),
    st.sampled_from(["drop", "duplicate", "indent", "dedent"]),
)
def test_line_mutations(lines: list[int], how: str) -> None:
    rows = VALID.splitlines(keepends=True)
    for n in sorted(set(lines), reverse=True):
        if how == "drop":
            del rows[n]
        elif how == "duplicate":
            rows.insert(n, rows[n])
        elif how == "indent":
            rows[n] = "  " + rows[n]
        else:
            rows[n] = rows[n][2:] if rows[n].startswith("  ") else rows[n]
    _answer("".join(rows).encode())


@FUZZ
@given(st.binary(min_size=1, max_size=8), st.integers(min_value=0, max_value=len(VALID)))
def test_byte_mutations(junk: bytes, at: int) -> None:
    raw = VALID.encode()
    _answer(raw[:at] + junk + raw[at:])


@settings(max_examples=20, deadline=None)
@given(st.integers(min_value=1, max_value=400), st.sampled_from(["[", "{a: ", "- ", "? "]))
def test_deep_nesting_is_refused_not_a_crash(depth: int, opener: str) -> None:
    closer = {"[": "]", "{a: ": "}", "- ": "", "? ": ""}[opener]
    if opener in ("- ", "? "):
        text = "".join("  " * i + opener + "\n" for i in range(depth)) + "  " * depth + "x\n"
    else:
        text = "x: " + opener * depth + "1" + closer * depth + "\n"
    answer = _answer(text.encode())
    assert isinstance(answer, RecipeError)
