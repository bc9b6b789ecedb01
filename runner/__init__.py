"""lotproof's machinery: recipes, the step graph, the executor, limits, run folders, CLI.

Every command has a function behind it, for notebooks and scripts::

    from runner import load_recipe, run_lot
    recipe = load_recipe("recipes/filter-disc-porosity.yaml")
    summary = run_lot(recipe, "demo_run/FD-2611", "runs")
    summary.verdicts.lot          # 'pass' | 'fail' | 'incomplete'
"""

__version__ = "0.1.0"

from runner.errors import InputError, LotproofError, Problem, RecipeError  # noqa: E402
from runner.recipe import Recipe, load_recipe, parse_recipe  # noqa: E402
from runner.run import RunSummary, run_lot  # noqa: E402

__all__ = [
    "InputError",
    "LotproofError",
    "Problem",
    "Recipe",
    "RecipeError",
    "RunSummary",
    "__version__",
    "load_recipe",
    "parse_recipe",
    "run_lot",
]
