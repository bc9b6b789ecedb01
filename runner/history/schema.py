"""The catalogue's tables and their migrations: one schema for SQLite and PostgreSQL.

Written with SQLAlchemy Core types only (``Text``, ``Integer``, ``Double``,
``Boolean``, ``DateTime``), so one definition serves both databases; nothing here
writes SQL of a dialect by hand.

Tables (every one can be rebuilt from the run folders; see
:mod:`lotproof.runner.history.entry` for what each column holds):

``schema_version``
    one row per migration applied: ``version``, ``description``.
``runs``
    one row per run folder, keyed by its absolute path (``run_dir``).
``limits``
    one row per (run, limit).
``images``
    one row per (run, image).
``image_values``
    one row per (run, image, step, value name), with its unit.

Migrations
----------
:data:`MIGRATIONS` is the ordered list of (version, description, function); a
catalogue at version *v* gets every later function applied, in order, inside one
transaction with the ``schema_version`` rows that record them (see
:meth:`lotproof.runner.history.catalogue.Catalogue.migrate`). A function takes the
open connection and changes the schema with SQLAlchemy constructs. A catalogue
whose version is newer than :data:`SCHEMA_VERSION` is refused, never changed.
"""

from __future__ import annotations

from collections.abc import Callable

from sqlalchemy import (
    Boolean,
    Column,
    Connection,
    DateTime,
    Double,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    Table,
    Text,
)

__all__ = [
    "MIGRATIONS",
    "SCHEMA_VERSION",
    "TABLES",
    "image_values",
    "images",
    "limits",
    "metadata",
    "runs",
    "schema_version",
]

metadata = MetaData()

schema_version = Table(
    "schema_version",
    metadata,
    Column("version", Integer, primary_key=True, autoincrement=False),
    Column("description", Text, nullable=False),
)

runs = Table(
    "runs",
    metadata,
    Column("run_dir", Text, primary_key=True),
    Column("run_name", Text, nullable=False),
    #: intact | altered | unfinished, as `lotproof verify` found the folder
    Column("status", Text, nullable=False),
    Column("problem", Text),
    Column("seal", Text),
    Column("recipe_name", Text),
    Column("recipe_revision", Integer),
    Column("recipe_sha256", Text),
    Column("git_commit", Text),
    Column("git_modified", Boolean),
    #: the lot's name (its folder's name) and the lot folder as the run recorded it
    Column("lot", Text),
    Column("lot_path", Text),
    Column("customer", Text),
    Column("order_ref", Text),
    Column("specification", Text),
    Column("operator", Text),
    Column("started_utc", DateTime(timezone=True)),
    Column("ended_utc", DateTime(timezone=True)),
    Column("lotproof_version", Text),
    Column("executor", Text),
    Column("lot_verdict", Text),
    Column("images", Integer),
    Column("incomplete_images", Integer),
    Column("exit_code", Integer),
    Index("runs_by_recipe", "recipe_name", "recipe_revision"),
    Index("runs_by_lot", "lot"),
    Index("runs_by_start", "started_utc"),
)

limits = Table(
    "limits",
    metadata,
    Column("run_dir", Text, ForeignKey("runs.run_dir"), primary_key=True),
    Column("name", Text, primary_key=True),
    Column("value_of", Text, nullable=False),
    Column("unit", Text, nullable=False),
    Column("over", Text, nullable=False),
    Column("low", Double),
    Column("high", Double),
    Column("bound", Text, nullable=False),
    Column("value", Double),
    Column("verdict", Text, nullable=False),
)

images = Table(
    "images",
    metadata,
    Column("run_dir", Text, ForeignKey("runs.run_dir"), primary_key=True),
    Column("image", Text, primary_key=True),
    Column("status", Text, nullable=False),
    Column("verdict", Text, nullable=False),
    Column("reason", Text, nullable=False),
    Column("pixel_size_um", Double),
)

image_values = Table(
    "image_values",
    metadata,
    Column("run_dir", Text, ForeignKey("runs.run_dir"), primary_key=True),
    Column("image", Text, primary_key=True),
    Column("step", Text, primary_key=True),
    Column("name", Text, primary_key=True),
    Column("unit", Text, nullable=False),
    Column("value", Double),
    Index("values_by_name", "step", "name"),
)

#: the tables that hold runs, children after their parent (deletes go in reverse)
TABLES = (runs, limits, images, image_values)


def _version_1(connection: Connection) -> None:
    """The first schema: runs, limits, images and per-image values."""
    metadata.create_all(connection, tables=list(TABLES), checkfirst=False)


#: (version, description, function) in the order they apply
MIGRATIONS: tuple[tuple[int, str, Callable[[Connection], None]], ...] = (
    (1, "runs, limits, images and per-image values", _version_1),
)

#: the version a catalogue has once every migration is applied
SCHEMA_VERSION = MIGRATIONS[-1][0]
