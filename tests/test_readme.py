"""The README stays short, keeps its two commands, and its step-kinds table is the registry's."""

from __future__ import annotations

import re
from pathlib import Path

from lotproof.runner.recipe.schema import step_kinds_markdown
from lotproof.steps import REGISTRY

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
#: the README's size bound, in bytes of UTF-8: everything longer belongs in docs/
MAX_BYTES = 16 * 1024
START, END = "<!-- step-kinds:start -->\n", "<!-- step-kinds:end -->"
#: the two commands a newcomer copies, exactly
COMMANDS = (
    "python3 -m venv .venv && . .venv/bin/activate && pip install -e . && lotproof demo",
    "python3 -m venv .venv && . .venv/bin/activate && pip install -e '.[test]' && pytest",
)
#: the README, DEVELOPERS.md and every page of docs/
DOCUMENTS = (README, ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md")))


def _text(path: Path = README) -> str:
    return path.read_text(encoding="utf-8")


def _table(text: str) -> str:
    assert text.count(START) == 1 and text.count(END) == 1, "the step-kinds markers, once each"
    start = text.index(START) + len(START)
    end = text.index(END)
    assert start <= end, "the step-kinds start marker comes first"
    return text[start:end]


def test_the_step_kinds_table_is_the_registry() -> None:
    assert _table(_text()) == step_kinds_markdown(), (
        "README.md's step-kinds table is stale; replace the lines between the markers with "
        'the output of python -c "from lotproof.runner.recipe.schema import '
        "step_kinds_markdown as t; print(t(), end='')\""
    )


def test_the_generated_table_names_every_kind_once() -> None:
    # the comparison above is only as good as the generator: every registered kind is a row
    rows = [line for line in step_kinds_markdown().splitlines() if line.startswith("| `")]
    names = [row.split("`")[1] for row in rows]
    assert names == sorted(REGISTRY)
    for row in rows:
        kind = REGISTRY[row.split("`")[1]]
        assert kind.summary in row


def test_a_stale_table_is_told_apart() -> None:
    # a README whose table lacks a kind must not pass the comparison
    table = step_kinds_markdown()
    stale = "\n".join(line for line in table.splitlines() if "`phase-fraction`" not in line)
    assert _table(f"x\n{START}{stale}\n{END}\n") != table


def test_the_readme_is_short() -> None:
    size = len(_text().encode("utf-8"))
    assert size < MAX_BYTES, f"README.md is {size} bytes; move reference material to docs/"


def test_the_two_commands_are_there_verbatim() -> None:
    text = _text()
    for command in COMMANDS:
        assert f"```sh\n{command}\n```" in text, command


def _anchors(text: str) -> set[str]:
    """The anchors of a Markdown page's headings, as the common renderers make them."""
    found = set()
    for heading in re.findall(r"^#{1,6} (.+)$", text, re.MULTILINE):
        slug = re.sub(r"[^\w\- ]", "", heading.strip().lower()).replace(" ", "-")
        found.add(slug)
    return found


def test_every_local_link_leads_to_a_file_and_heading() -> None:
    assert len(DOCUMENTS) > 3
    broken = []
    for path in DOCUMENTS:
        for target, anchor in re.findall(r"\]\(([^)#\s]*)(?:#([^)\s]*))?\)", _text(path)):
            if "://" in target:
                continue
            linked = path.parent / target if target else path
            if not linked.exists():
                broken.append(f"{path.relative_to(ROOT)}: {target}")
            elif anchor and anchor not in _anchors(_text(linked)):
                broken.append(f"{path.relative_to(ROOT)}: {target}#{anchor}")
    assert broken == []


def test_the_anchor_rule_is_the_renderers() -> None:
    assert _anchors(
        "# Cache format (`lotproof-cache/1`)\n## First run: compiling the kernels\n"
    ) == {
        "cache-format-lotproof-cache1",
        "first-run-compiling-the-kernels",
    }


def test_python_examples_import_from_lotproof() -> None:
    # the top-level names runner and steps are gone: every example says lotproof
    old = re.compile(r"^\s*(?:from|import)\s+(?:runner|steps)\b", re.MULTILINE)
    assert len(DOCUMENTS) > 3
    for path in DOCUMENTS:
        assert not old.search(_text(path)), f"{path.relative_to(ROOT)} imports runner or steps"
