"""The kept JSON Schema, recipe modelines, and the `steps` / `schema` commands."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from lotproof.runner.cli.main import main
from lotproof.runner.recipe.schema import SCHEMA_FILE, recipe_json_schema, schema_text
from lotproof.steps import REGISTRY

ROOT = Path(__file__).resolve().parent.parent
RECIPES = sorted((ROOT / "recipes").glob("*.yaml"))


def test_kept_schema_equals_generated() -> None:
    kept = (ROOT / SCHEMA_FILE).read_text(encoding="utf-8")
    assert kept == schema_text(), "run `lotproof schema > recipes/lotproof-recipe.schema.json`"


def test_schema_is_draft07_and_knows_every_kind() -> None:
    schema = recipe_json_schema()
    assert schema["$schema"] == "http://json-schema.org/draft-07/schema#"
    assert "$defs" not in json.dumps(schema) and "prefixItems" not in json.dumps(schema)
    kinds = {
        d["properties"]["apply"]["const"]
        for d in schema["definitions"].values()
        if "apply" in d.get("properties", {})
    }
    assert kinds == set(REGISTRY)


@pytest.mark.parametrize("recipe", RECIPES, ids=[p.name for p in RECIPES])
def test_recipes_start_with_the_schema_modeline_and_check(
    recipe: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    first = recipe.read_text(encoding="utf-8").splitlines()[0]
    assert first == "# yaml-language-server: $schema=lotproof-recipe.schema.json"
    with pytest.raises(SystemExit) as exit_info:
        main(["check", str(recipe)])
    assert exit_info.value.code == 0


def test_there_is_at_least_the_demo_recipe() -> None:
    assert (ROOT / "recipes" / "filter-disc-porosity.yaml") in RECIPES


def test_steps_lists_every_kind_from_the_registry(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["steps", "--json"])
    assert exit_info.value.code == 0
    listed = json.loads(capsys.readouterr().out)
    assert set(listed) == set(REGISTRY)
    for name, entry in listed.items():
        fields = set(REGISTRY[name].params.model_fields)
        assert {p["name"] for p in entry["parameters"]} == fields
        assert entry["summary"], name
        assert all(p["description"] for p in entry["parameters"]), name


def test_steps_kind_shows_parameters_and_values(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["steps", "measure"])
    out = capsys.readouterr().out
    assert "area_fraction" in out and "1/mm2" in out and "connectivity" in out


def test_steps_unknown_kind_suggests(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["steps", "erdoe"])
    assert exit_info.value.code == 2
    assert "did you mean 'erode'?" in capsys.readouterr().err


def test_schema_command_prints_the_schema(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["schema"])
    assert exit_info.value.code == 0
    assert capsys.readouterr().out == schema_text()
