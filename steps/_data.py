"""Data containers that steps give besides plain arrays."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Output", "Table"]


@dataclass(frozen=True)
class Table:
    """Rows stored by column: per-object measurements, or other rows (size classes).

    ``columns`` maps a column name to a 1-D numpy array; all columns have the same
    length. ``units`` gives each column's unit (``"-"`` for dimensionless or
    identifiers). ``per_object`` says that each row is one object (rows sorted by
    ``label``; written to ``objects.csv``); other tables, such as the classes of a
    size spectrum, are written to ``tables.csv``.
    """

    columns: Mapping[str, np.ndarray]
    units: Mapping[str, str]
    per_object: bool = True

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
