"""The bundled demo scenarios (``lotproof demo [NAME]``): which recipe runs on which lot.

Each scenario is a recipe from ``recipes/`` and a synthetic lot from
``demo_run/`` made by a checked-in generator; every scenario writes its run
folders into ``demo_run/runs/`` (run folder names carry the recipe name, so the
scenarios never collide). A study scenario (``validation``) names a validation
plan instead, and a generator that makes its images when the demo runs
(:func:`prepare_study`). Paths are relative to the source tree the package was
installed from.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType

from lotproof.runner.errors import InputError, LotproofError

__all__ = [
    "DEFAULT_SCENARIO",
    "DEMO_LOT",
    "DEMO_OUT",
    "DEMO_RECIPE",
    "SCENARIOS",
    "Scenario",
    "demo_paths",
    "prepare_study",
    "project_root",
]

#: Where every scenario writes its run folders.
DEMO_OUT = "demo_run/runs"


@dataclass(frozen=True)
class Scenario:
    """One demo: a recipe, the lot it runs on, and where its run folders go.

    ``recipe``, ``lot`` and ``out`` are paths relative to the project root;
    ``summary`` is one line for people. ``kind`` is ``lot`` (run the recipe on the
    lot), ``history`` (:mod:`lotproof.runner.jobs.history_demo`: many generated lots
    into one catalogue; ``lot`` is the folder of its generator) or ``study`` (a
    validation ``plan``, whose images the ``generator`` script writes into ``lot``).
    """

    name: str
    recipe: str
    lot: str
    out: str
    summary: str
    kind: str = "lot"
    plan: str = ""
    generator: str = ""

    @property
    def is_study(self) -> bool:
        return self.kind == "study"


SCENARIOS: Mapping[str, Scenario] = MappingProxyType(
    {
        s.name: s
        for s in (
            Scenario(
                "filter-disc",
                "recipes/filter-disc-porosity.yaml",
                "demo_run/FD-2611",
                DEMO_OUT,
                "porosity of sintered bronze filter discs, 2D cross-sections (lot FD-2611)",
            ),
            Scenario(
                "powder",
                "recipes/powder-size.yaml",
                "demo_run/powder/PW-2612",
                DEMO_OUT,
                "particle size and fines of a gas-atomised powder, touching particles (lot PW-2612)",
            ),
            Scenario(
                "lattice",
                "recipes/lattice-voids.yaml",
                "demo_run/lattice/LC-2612",
                DEMO_OUT,
                "gas voids in additively made lattice struts, 3D CT volumes",
            ),
            Scenario(
                "history",
                "recipes/bearing-porosity.yaml",
                "demo_run/history",
                "demo_run/runs/history",
                "32 lots of sintered bronze bearings over ten weeks, one method revision, "
                "a drift: lot history, control charts, capability",
                kind="history",
            ),
            Scenario(
                "validation",
                "recipes/coating-porosity.yaml",
                "demo_run/validation/images",
                DEMO_OUT,
                "validation study of a coating porosity method: precision of 10 parts by 3 "
                "operators, trueness on 4 references, robustness of 3 parameters",
                kind="study",
                plan="demo_run/validation/plan.yaml",
                generator="demo_run/validation/generate.py",
            ),
        )
    }
)

#: The scenario :func:`demo_paths` gives when called without a name.
DEFAULT_SCENARIO = "filter-disc"

#: The default scenario's recipe and lot (kept for callers of the first demo).
DEMO_RECIPE = SCENARIOS[DEFAULT_SCENARIO].recipe
DEMO_LOT = SCENARIOS[DEFAULT_SCENARIO].lot


def project_root() -> Path:
    """The source tree this package was installed from (an editable install)."""
    return Path(__file__).resolve().parents[2]  # runner/jobs/demo.py -> the tree


def demo_paths(name: str | None = None) -> tuple[Path, Path, Path]:
    """(recipe, lot, output folder) of the scenario ``name``; an error when they are not there.

    Parameters
    ----------
    name : str, optional
        A key of :data:`SCENARIOS`; without one, :data:`DEFAULT_SCENARIO`.

    Returns
    -------
    tuple of Path
        Absolute paths of the recipe file, the lot folder and the folder that
        receives the run folders.

    Raises
    ------
    LotproofError
        For an unknown name (exit code 2).
    InputError
        When the recipe or the lot is missing (the package was not installed
        from its source tree; exit code 3).
    """
    key = DEFAULT_SCENARIO if name is None else name
    scenario = SCENARIOS.get(key)
    if scenario is None:
        # a wrong name on the command line: exit 2, nothing ran
        raise LotproofError(f"no demo scenario {key!r}; the scenarios are {', '.join(SCENARIOS)}")
    root = project_root()
    recipe, lot = root / scenario.recipe, root / scenario.lot
    if scenario.is_study:
        lot = lot.parent  # the images are made when the demo runs
    if not recipe.is_file() or not lot.is_dir():
        raise InputError(
            f"the demo {scenario.name!r} needs {scenario.recipe} and {scenario.lot} beside the "
            f"package (looked in {root}); install lotproof from its source tree with "
            "`pip install -e .`"
        )
    return recipe, lot, root / scenario.out


def prepare_study(name: str) -> Path:
    """Make the images of the study scenario ``name`` with its generator; return its plan.

    The generator is a checked-in script (run, not imported as a module of the
    package) that writes the same bytes every time into the scenario's ``lot``.

    Raises
    ------
    LotproofError
        When ``name`` is not a study scenario (exit code 2).
    InputError
        When the plan or the generator is missing (exit code 3).
    """
    import importlib.util

    scenario = SCENARIOS.get(name)
    if scenario is None or not scenario.is_study:
        raise LotproofError(f"{name!r} is not a study scenario")
    demo_paths(name)
    root = project_root()
    plan, generator = root / scenario.plan, root / scenario.generator
    if not plan.is_file() or not generator.is_file():
        raise InputError(
            f"the demo {name!r} needs {scenario.plan} and {scenario.generator} beside the package"
        )
    spec = importlib.util.spec_from_file_location(f"lotproof_demo_{name}", generator)
    if spec is None or spec.loader is None:
        raise InputError(f"{generator}: cannot be loaded")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    module.generate(root / scenario.lot)
    return plan
