"""The history demo (``lotproof demo history``): ten weeks of lots, one catalogue, one trend.

:func:`run_history_demo` makes the 32 lots of ``demo_run/history/generate.py``
(seeded: the same lots every time) into ``OUT/lots/``, runs each with the recipe
revision the invented lab used for it (revision 1 from
``demo_run/history/bearing-porosity-r1.yaml`` for the first lots, revision 2 from
``recipes/bearing-porosity.yaml`` after), in production order, into ``OUT``; every
run is recorded in ``OUT/history.sqlite`` as any run is. It then reads the lot
trend of the pore fraction from the catalogue and writes the trend page,
``OUT/trend.html``.

The images are small (about 2.5 MB for all 128) and made at demo time; nothing of
them is in the source tree. Run times are those of the demo run itself: the lots'
production days are in ``OUT/lots/lot-truth.json``.
"""

from __future__ import annotations

import importlib.util
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from types import ModuleType

from lotproof.runner.errors import InputError
from lotproof.runner.evaluate.cache import NullStore
from lotproof.runner.history.catalogue import Catalogue, catalogue_url
from lotproof.runner.history.trend import Trend, lot_trend
from lotproof.runner.jobs.demo import project_root
from lotproof.runner.jobs.run import RunSummary, run_lot
from lotproof.runner.lot.local import LocalExecutor
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.show.trend import write_trend_page

__all__ = [
    "GENERATOR",
    "RECIPES",
    "TREND_PAGE",
    "TREND_VALUE",
    "HistoryDemo",
    "lot_generator",
    "run_history_demo",
]

#: the lot generator, relative to the project root
GENERATOR = "demo_run/history/generate.py"
#: recipe revision -> recipe file, relative to the project root
RECIPES = {1: "demo_run/history/bearing-porosity-r1.yaml", 2: "recipes/bearing-porosity.yaml"}
#: the value the demo charts
TREND_VALUE = "pore-stats.area_fraction"
#: the trend page, in the demo's output folder
TREND_PAGE = "trend.html"


@dataclass
class HistoryDemo:
    """What the demo made: the runs (in production order), the trend, where things are."""

    out: Path
    catalogue: str
    runs: list[RunSummary] = field(default_factory=list)
    trend: Trend | None = None
    page: Path | None = None


def lot_generator(root: Path) -> ModuleType:
    """The lot generator module (``demo_run/history/generate.py`` under ``root``), loaded."""
    path = root / GENERATOR
    spec = importlib.util.spec_from_file_location("lotproof_history_demo_lots", path)
    if spec is None or spec.loader is None or not path.is_file():
        raise InputError(
            f"the history demo needs {GENERATOR} beside the package (looked in {root}); install "
            "lotproof from its source tree with `pip install -e .`"
        )
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while it loads
    spec.loader.exec_module(module)
    return module


def run_history_demo(
    out: Path,
    *,
    db: str | None = None,
    on_run: Callable[[RunSummary], None] | None = None,
) -> HistoryDemo:
    """Make the demo's lots, run them in production order, chart the pore fraction.

    Parameters
    ----------
    out
        The folder that receives the lots (``out/lots``), the run folders, the
        catalogue (unless ``db``) and the trend page.
    db
        Another catalogue (a database URL) instead of ``out/history.sqlite``.
    on_run
        Called with each run's summary as it finishes.
    """
    root = project_root()
    out = Path(out)
    recipes = {}
    for revision, relative in RECIPES.items():
        if not (root / relative).is_file():
            raise InputError(
                f"the history demo needs {relative} beside the package (looked in {root})"
            )
        recipes[revision] = load_recipe(root / relative)
    lots = lot_generator(root).write_lots(out / "lots")
    url = catalogue_url(out, db)
    demo = HistoryDemo(out=out, catalogue=url)
    executor = LocalExecutor(1)  # small images: one process beats starting a pool per lot
    for lot, folder in lots:
        summary = run_lot(
            recipes[lot.revision], folder, out, store=NullStore(), executor=executor, db=url
        )
        demo.runs.append(summary)
        if on_run is not None:
            on_run(summary)
    recipe = recipes[max(recipes)].name
    with Catalogue(url, must_exist=True) as catalogue:
        demo.trend = lot_trend(catalogue, recipe, TREND_VALUE)
        demo.catalogue = catalogue.shown
    demo.page = write_trend_page(demo.trend, out / TREND_PAGE, catalogue=demo.catalogue)
    return demo
