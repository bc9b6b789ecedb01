"""Semantic recipe diff: layout, comments and key order never show; meaning does."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

import lotproof.runner.cli.record  # noqa: F401 - registers the record commands
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID, EXIT_OK, RecipeError
from lotproof.runner.recipe.diff import diff_recipes

from _builders import git, write_recipe

BASE = """\
format: lotproof/1
name: disc-porosity
revision: 4
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background
    to: section
    features: dark
    footprint: disk
    radius: 10 um
  pores:
    apply: threshold
    to: level
    method: otsu
  clean:
    apply: open
    to: pores
    footprint: disk
    radius: 1.5 um
  stats:
    apply: measure
    to: clean
    connectivity: 8
limits:
  porosity:
    value: stats.area_fraction
    max: 0.18
  largest:
    value: stats.ecd_max
    max: 60 um
"""

# the same method: keys reordered, comments, flow style, other spellings, defaults written out
SAME = """\
# reordered and commented
revision: 4
name: disc-porosity
format: "lotproof/1"
inputs: {section: '*.tif'}
pixel_size: 500 nm
limits:
  largest: {max: 0.06 mm, value: stats.ecd_max}
  porosity:
    max: 0.180
    value: stats.area_fraction
steps:
  stats: {apply: measure, to: clean, connectivity: 8}
  clean:
    radius: 1500 nm      # the same 1.5 um
    footprint: disk
    to: pores
    apply: open
  pores:
    to: level
    apply: threshold
    method: otsu
    features: bright     # the default, written out
  level:
    radius: 10 um
    to: section
    apply: subtract-background
    footprint: disk
    features: dark
"""


def test_reordering_comments_and_spelling_are_identical(tmp_path: Path) -> None:
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, SAME, "b.yaml"))
    )
    assert diff.identical, diff.as_dict()
    assert diff.bytes_differ
    assert diff.warnings == []


def test_changed_radius_is_caught_with_pixels(tmp_path: Path) -> None:
    changed = BASE.replace("radius: 1.5 um", "radius: 2 um")
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, changed, "b.yaml"))
    )
    assert not diff.identical
    assert [c.as_dict() for c in diff.steps_changed] == [
        # source: closed form, 1.5 um / 0.5 um per pixel = 3 px, 2 um / 0.5 um = 4 px
        {"where": "steps.clean.radius", "a": "1.5 um (3 px)", "b": "2 um (4 px)", "note": ""}
    ]
    assert diff.top == [] and diff.limits_changed == []
    # the method changed but its revision did not
    assert len(diff.warnings) == 1 and "revision did not" in diff.warnings[0]


def test_bumped_revision_gives_no_warning(tmp_path: Path) -> None:
    changed = BASE.replace("radius: 1.5 um", "radius: 2 um").replace("revision: 4", "revision: 5")
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, changed, "b.yaml"))
    )
    assert [c.where for c in diff.top] == ["revision"]
    assert diff.warnings == []


def test_pixels_written_for_micrometres_is_a_change_with_a_note(tmp_path: Path) -> None:
    changed = BASE.replace("radius: 1.5 um", "radius: 3 px")
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, changed, "b.yaml"))
    )
    (change,) = diff.steps_changed
    assert (change.a, change.b) == ("1.5 um (3 px)", "3 px")
    assert "same in pixels" in change.note


def test_pixel_size_change_shows_on_every_physical_length(tmp_path: Path) -> None:
    changed = BASE.replace("pixel_size: 0.5 um", "pixel_size: 0.25 um").replace(
        "revision: 4", "revision: 5"
    )
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, changed, "b.yaml"))
    )
    assert [c.as_dict() for c in diff.top] == [
        {"where": "revision", "a": 4, "b": 5, "note": ""},
        {"where": "pixel_size", "a": "0.5 um", "b": "0.25 um", "note": ""},
    ]
    assert {c.where: (c.a, c.b) for c in diff.steps_changed} == {
        "steps.level.radius": ("10 um (20 px)", "10 um (40 px)"),
        "steps.clean.radius": ("1.5 um (3 px)", "1.5 um (6 px)"),
    }


def test_steps_and_limits_added_removed_changed(tmp_path: Path) -> None:
    changed = (
        BASE.replace("    max: 0.18\n", "    max: 0.2\n")
        .replace(
            "  largest:\n    value: stats.ecd_max\n    max: 60 um\n",
            "  mean-porosity:\n    value: stats.area_fraction\n    over: lot-mean\n    max: 0.15\n",
        )
        .replace("    to: clean\n    connectivity: 8", "    to: holes\n    connectivity: 4")
        .replace("  stats:\n", "  holes:\n    apply: fill-holes\n    to: clean\n  stats:\n")
    )
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, changed, "b.yaml"))
    )
    assert diff.steps_added == ["holes"] and diff.steps_removed == []
    assert {c.where: (c.a, c.b) for c in diff.steps_changed} == {
        "steps.stats.to": (["clean"], ["holes"]),
        "steps.stats.connectivity": (8, 4),
    }
    assert diff.limits_added == ["mean-porosity"] and diff.limits_removed == ["largest"]
    assert [(c.where, c.a, c.b) for c in diff.limits_changed] == [
        ("limits.porosity.max", "0.18", "0.2")
    ]


def test_another_step_kind_is_one_change(tmp_path: Path) -> None:
    changed = BASE.replace("apply: open", "apply: close")
    diff = diff_recipes(
        str(write_recipe(tmp_path, BASE, "a.yaml")), str(write_recipe(tmp_path, changed, "b.yaml"))
    )
    assert [(c.where, c.a, c.b) for c in diff.steps_changed] == [
        ("steps.clean.apply", "open", "close")
    ]


def test_invalid_recipe_is_a_recipe_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = write_recipe(tmp_path, BASE.replace("radius: 1.5 um", "radius: 3"), "b.yaml")
    good = write_recipe(tmp_path, BASE, "a.yaml")
    with pytest.raises(RecipeError) as info:
        diff_recipes(str(good), str(bad))
    assert "steps.clean.radius" in str(info.value)
    with pytest.raises(SystemExit) as done:
        main(["diff", str(good), str(bad)])
    assert done.value.code == EXIT_INVALID
    assert "b.yaml:" in capsys.readouterr().err


@pytest.fixture()
def repo(tmp_path: Path) -> Path:
    repo = tmp_path / "methods"
    (repo / "recipes").mkdir(parents=True)
    git(repo, "init", "-q")
    write_recipe(repo / "recipes", BASE, "disc.yaml")
    git(repo, "add", ".")
    git(repo, "commit", "-q", "-m", "r4")
    write_recipe(
        repo / "recipes",
        BASE.replace("radius: 1.5 um", "radius: 2 um").replace("revision: 4", "revision: 5"),
        "disc.yaml",
    )
    git(repo, "commit", "-q", "-am", "r5")
    return repo


def test_path_at_git_revision(repo: Path) -> None:
    recipe = repo / "recipes" / "disc.yaml"
    diff = diff_recipes(f"{recipe}@HEAD~1", f"{recipe}@HEAD")
    assert [c.where for c in diff.steps_changed] == ["steps.clean.radius"]
    assert (diff.a_label, diff.b_label) == ("disc-porosity r4", "disc-porosity r5")
    # the working copy against its own commit
    assert diff_recipes(f"{recipe}@HEAD", str(recipe)).identical


def test_path_at_revision_from_another_folder(
    repo: Path, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    diff = diff_recipes("../methods/recipes/disc.yaml@HEAD~1", "../methods/recipes/disc.yaml")
    assert [c.where for c in diff.top] == ["revision"]


def test_bad_git_revision_or_no_repo(repo: Path, tmp_path: Path) -> None:
    recipe = repo / "recipes" / "disc.yaml"
    with pytest.raises(RecipeError, match="git show no-such-rev"):
        diff_recipes(f"{recipe}@no-such-rev", str(recipe))
    loose = write_recipe(tmp_path, BASE, "loose.yaml")
    with pytest.raises(RecipeError, match="not inside a git work tree"):
        diff_recipes(f"{loose}@HEAD", str(loose))
    with pytest.raises(RecipeError, match="not a git revision"):
        diff_recipes(f"{recipe}@--output=x", str(recipe))


def test_cli_diff(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a, b = write_recipe(tmp_path, BASE, "a.yaml"), write_recipe(tmp_path, SAME, "b.yaml")
    with pytest.raises(SystemExit) as done:
        main(["diff", str(a), str(b)])
    assert done.value.code == EXIT_OK
    assert "identical (only comments or layout differ)" in capsys.readouterr().out
    c = write_recipe(tmp_path, BASE.replace("radius: 1.5 um", "radius: 2 um"), "c.yaml")
    with pytest.raises(SystemExit) as done:
        main(["diff", str(a), str(c), "--json"])
    assert done.value.code == EXIT_OK
    document = json.loads(capsys.readouterr().out)
    assert document["identical"] is False
    assert document["steps"]["changed"][0]["where"] == "steps.clean.radius"
    assert document["warnings"]
