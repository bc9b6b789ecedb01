"""Data containers that steps give besides plain arrays."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Table", "Output"]


@dataclass(frozen=True)
class Table:
    """Per-object rows, stored by column.

    ``columns`` maps a column name to a 1-D numpy array; all columns have the same
    length and rows are sorted by ``label``. ``units`` gives each column's unit
    (``"-"`` for dimensionless or identifiers).
    """

    columns: Mapping[str, np.ndarray]
    units: Mapping[str, str]

    def __post_init__(self) -> None:
        lengths = {len(v) for v in self.columns.values()}
        if len(lengths) > 1:
            raise ValueError(f"table columns differ in length: {sorted(lengths)}")
        missing = set(self.columns) - set(self.units)
        if missing:
            raise ValueError(f"table columns without a unit: {sorted(missing)}")

    @property
    def n_rows(self) -> int:
        for column in self.columns.values():
            return len(column)
        return 0


@dataclass(frozen=True)
class Output:
    """A step's data together with the named values it reports.

    ``values`` maps a value name (as declared by the step kind) to a float;
    ``units`` maps the same names to their units. Limits refer to them as
    ``STEP.NAME``.
    """

    data: object
    values: Mapping[str, float] = field(default_factory=dict)
    units: Mapping[str, str] = field(default_factory=dict)
