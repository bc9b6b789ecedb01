"""lotproof: reproducible image quality control for production labs.

The Python API behind every command, for notebooks and scripts::

    from lotproof import load_recipe, run_lot
    recipe = load_recipe("recipes/filter-disc-porosity.yaml")
    summary = run_lot(recipe, "demo_run/FD-2611", "runs")
    summary.verdicts.lot          # 'pass' | 'fail' | 'incomplete'

The package has two parts: :mod:`lotproof.steps`, the library of step kinds (pure
functions on numpy arrays), and :mod:`lotproof.runner`, the machinery that runs a
recipe over a lot and writes the run record. In the repository they are the
top-level folders ``steps/`` and ``runner/``.
"""

from typing import TYPE_CHECKING, Any

from lotproof.runner import __version__

if TYPE_CHECKING:
    from lotproof.runner.errors import InputError, LotproofError, Problem, RecipeError
    from lotproof.runner.jobs.run import RunSummary, run_lot
    from lotproof.runner.recipe.load import load_recipe, parse_recipe
    from lotproof.runner.recipe.model import Recipe

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

#: where each name of the API lives; imported on first use, so that ``import lotproof``
#: (and the command line's first instant) costs nothing until the machinery is needed
_API = {
    "InputError": "lotproof.runner.errors",
    "LotproofError": "lotproof.runner.errors",
    "Problem": "lotproof.runner.errors",
    "RecipeError": "lotproof.runner.errors",
    "RunSummary": "lotproof.runner.jobs.run",
    "run_lot": "lotproof.runner.jobs.run",
    "load_recipe": "lotproof.runner.recipe.load",
    "parse_recipe": "lotproof.runner.recipe.load",
    "Recipe": "lotproof.runner.recipe.model",
}


def __getattr__(name: str) -> Any:
    if name in _API:
        import importlib

        value = getattr(importlib.import_module(_API[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'lotproof' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
