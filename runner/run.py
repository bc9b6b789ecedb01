"""``lotproof run`` as a function: recipe + lot -> run folder, verdicts, exit code."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from runner.errors import EXIT_BAD_INPUT, EXIT_LIMIT_FAILED, EXIT_OK
from runner.executor import ImageResult, analyse_sample
from runner.inputs import find_samples
from runner.limits import FAIL, Verdicts, evaluate_limits
from runner.outputs import create_run_folder, write_run_files
from runner.recipe import Recipe, load_recipe

__all__ = ["RunSummary", "exit_code_for", "run_lot"]


@dataclass
class RunSummary:
    run_dir: Path
    recipe: Recipe
    lot: Path
    results: list[ImageResult]
    verdicts: Verdicts
    files: list[str]

    @property
    def exit_code(self) -> int:
        return exit_code_for(self.verdicts)

    def as_json(self) -> dict[str, object]:
        """The ``run --json`` document."""
        return {
            "run_dir": str(self.run_dir),
            "method": self.recipe.name,
            "revision": self.recipe.revision,
            "recipe_sha256": self.recipe.sha256,
            "lot": str(self.lot),
            "verdict": self.verdicts.lot,
            "images": len(self.results),
            "incomplete": {r.id: r.reason for r in self.results if r.status != "ok"},
            "limits": {
                name: {
                    "value": lv.value if lv.over != "each" else None,
                    "unit": lv.unit,
                    "bound": lv.bound_text(),
                    "verdict": lv.verdict,
                    "images": {
                        image: verdict for image, (_, verdict) in lv.per_image.items()
                    },
                }
                for name, lv in self.verdicts.limits.items()
            },
            "exit_code": self.exit_code,
        }


def exit_code_for(verdicts: Verdicts) -> int:
    """0 every limit passed; 1 a limit failed; 3 an image could not be analysed.

    Bad data (3) outranks a failed limit (1): a lot with an unreadable image needs a
    person before anything else, and its verdict is never ``pass`` either way.
    """
    if verdicts.incomplete_images or verdicts.images == 0:
        return EXIT_BAD_INPUT
    if verdicts.lot == FAIL:
        return EXIT_LIMIT_FAILED
    if verdicts.lot != "pass":
        return EXIT_BAD_INPUT
    return EXIT_OK


def run_lot(
    recipe: Recipe | str | Path,
    lot: str | Path,
    out: str | Path,
    *,
    on_start: Callable[[int], None] | None = None,
    on_image: Callable[[ImageResult], None] | None = None,
) -> RunSummary:
    """Run ``recipe`` on every image of ``lot`` and write a new run folder under ``out``.

    Raises
    ------
    RecipeError
        When the recipe is invalid (nothing ran).
    InputError
        When the lot folder cannot be used at all (nothing ran).
    """
    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    lot = Path(lot)
    samples = find_samples(lot, recipe.inputs)
    if on_start is not None:
        on_start(len(samples))
    results = []
    for sample in samples:
        result = analyse_sample(recipe, sample, lot)
        results.append(result)
        if on_image is not None:
            on_image(result)
    verdicts = evaluate_limits(recipe, results)
    run_dir = create_run_folder(Path(out), recipe)
    files = write_run_files(run_dir, recipe, results, verdicts, lot)
    return RunSummary(run_dir, recipe, lot, results, verdicts, files)
