"""Helpers of the catalogue tests: small lots and recipes, the runs the session shares, the
test server's handle. The fixtures that use them are in conftest.py beside this file."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import tifffile

RECIPE = """\
format: lotproof/1
name: {name}
revision: {revision}
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  spots:
    apply: threshold
    to: section
    method: fixed
    level: 100
  stats:
    apply: measure
    to: spots
    connectivity: 8
limits:
  fraction:
    value: stats.area_fraction
    max: {max_fraction}
  mean-fraction:
    value: stats.area_fraction
    over: lot-mean
    range: [0.001, 0.05]
"""


@dataclass(frozen=True)
class PostgresServer:
    """A running throw-away cluster: its socket folder and port."""

    socket_dir: Path
    port: int
    bindir: Path

    def url(self, database: str) -> str:
        return f"postgresql+psycopg://postgres@/{database}?host={self.socket_dir}&port={self.port}"

    def admin(self, sql: str, database: str = "postgres") -> None:
        """Run one statement as the superuser, outside a transaction (CREATE/DROP DATABASE)."""
        import psycopg

        with psycopg.connect(
            host=str(self.socket_dir),
            port=self.port,
            user="postgres",
            dbname=database,
            autocommit=True,
        ) as connection:
            connection.execute(sql)


# ---------------------------------------------------------------- small lots and recipes


def spot_image(n_spots: int, size: int = 64) -> np.ndarray:
    """A uint8 image with ``n_spots`` bright 4x4 squares (16 px each) on a dark field."""
    image = np.full((size, size), 20, np.uint8)
    for i in range(n_spots):
        y, x = 8 + 16 * (i // 3), 8 + 16 * (i % 3)
        image[y : y + 4, x : x + 4] = 200
    return image


def make_lot(folder: Path, name: str, spots: list[int]) -> Path:
    """A lot folder ``folder/name`` with one image per entry of ``spots``."""
    lot = folder / name
    lot.mkdir(parents=True)
    for i, n in enumerate(spots):
        tifffile.imwrite(lot / f"disc-{i:02d}.tif", spot_image(n))
    return lot


def make_recipe(
    folder: Path, *, name: str = "spot-test", revision: int = 1, max_fraction: float = 0.05
) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{name}-r{revision}.yaml"
    path.write_text(RECIPE.format(name=name, revision=revision, max_fraction=max_fraction))
    return path


# ---------------------------------------------------------------- runs shared by the tests

#: spots per image of each lot (area fraction of an image = spots * 16 / 4096 = spots / 256),
#: with the recipe revision each lot is run with, in the order they are run
LOT_PLAN = (
    ("L-01", 1, [2, 2, 3]),
    ("L-02", 1, [2, 3, 3]),
    ("L-03", 1, [3, 3, 2]),
    ("L-04", 1, [2, 2, 2]),
    ("L-05", 2, [3, 3, 3]),
    ("L-06", 2, [3, 4, 3]),
    ("L-07", 2, [4, 3, 3]),
    ("L-08", 2, [3, 3, 4]),
    ("L-09", 2, [8, 9, 9]),
    ("L-10", 2, [3, 3, 3]),
)
#: a lot run again, later, with the same revision: its latest run counts
RERUN_LOT = "L-04"
#: a lot whose images exceed the per-image limit of revision 2 (max 0.03: 9/256 = 0.035)
FAILING_LOT = "L-09"


@dataclass
class LotRuns:
    """Run folders made once for the session: ``out`` with its own (incremental) catalogue."""

    root: Path
    out: Path
    recipes: dict[int, Path]
    lots: dict[str, Path]
    #: run folder of each run, in the order run
    runs: list[Path]

    @property
    def incremental_url(self) -> str:
        return f"sqlite:///{self.out / 'history.sqlite'}"
