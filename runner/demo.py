"""Where the bundled demo lives (``lotproof demo``)."""

from __future__ import annotations

from pathlib import Path

from runner.errors import InputError

__all__ = ["DEMO_RECIPE", "DEMO_LOT", "project_root", "demo_paths"]

DEMO_RECIPE = "recipes/filter-disc-porosity.yaml"
DEMO_LOT = "demo_run/lot"
DEMO_OUT = "demo_run/runs"


def project_root() -> Path:
    """The source tree this package was installed from (an editable install)."""
    return Path(__file__).resolve().parent.parent


def demo_paths() -> tuple[Path, Path, Path]:
    """(recipe, lot, output folder) of the demo; an error when they are not there."""
    root = project_root()
    recipe, lot = root / DEMO_RECIPE, root / DEMO_LOT
    if not recipe.is_file() or not lot.is_dir():
        raise InputError(
            f"the demo needs {DEMO_RECIPE} and {DEMO_LOT} beside the package (looked in {root}); "
            "install lotproof from its source tree with `pip install -e .`"
        )
    return recipe, lot, root / DEMO_OUT
