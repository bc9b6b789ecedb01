"""lotproof's step kinds: one module per family, registered in :data:`REGISTRY`.

Each step kind is a frozen pydantic parameter model, a pure function on numpy
arrays and a version string (see :mod:`lotproof.steps._registry`). Steps know nothing of
recipes, caches, ledgers or files.
"""

from lotproof.steps._data import Output, Table
from lotproof.steps._registry import (
    DATA_KINDS,
    REGISTRY,
    SAME,
    StepKind,
    StepParams,
    get_kind,
    step,
)
from lotproof.steps.units import AREA_UNITS, LENGTH_UNITS, Area, Length, resolve_to_px

# Importing the family modules registers their step kinds.
from lotproof.steps import filters, masks, measure, morphology, threshold  # noqa: F401  isort: skip
from lotproof.steps import granulometry, segmentation  # noqa: F401  isort: skip
from lotproof.steps import calibration, quality  # noqa: F401  isort: skip

__all__ = [
    "AREA_UNITS",
    "DATA_KINDS",
    "LENGTH_UNITS",
    "REGISTRY",
    "SAME",
    "Area",
    "Length",
    "Output",
    "StepKind",
    "StepParams",
    "Table",
    "get_kind",
    "resolve_to_px",
    "step",
]
