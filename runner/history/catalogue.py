"""The catalogue of runs: which database, opening it, recording runs, rebuilding, reading.

Which database
--------------
``--db URL`` names it; without one, ``LOTPROOF_DB``; without that, the SQLite file
``history.sqlite`` in the runs folder (``--out`` of ``lotproof run``). A URL is a
SQLAlchemy URL; ``postgresql://`` (or ``postgres://``) means PostgreSQL through
psycopg 3, and a plain path means an SQLite file. Passwords are never shown
(:func:`shown_url`).

How it is written
-----------------
One write transaction per run: the run's old rows (if it was recorded before) are
deleted and its new rows inserted, so recording a run twice gives the same
catalogue as recording it once. SQLite runs in WAL mode with a busy timeout
(:data:`BUSY_TIMEOUT_S`), and a write transaction takes the write lock when it
begins (``BEGIN IMMEDIATE``), so two runs finishing at once wait for each other
instead of failing; PostgreSQL's transactions do the same. The schema is
migrated when a catalogue is opened (:mod:`lotproof.runner.history.schema`).

The catalogue is an index: :func:`rebuild` makes it again from the run folders,
which stay the source of truth.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, Engine, create_engine, delete, event, insert, inspect, select
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, IntegrityError, SQLAlchemyError
from sqlalchemy.pool import NullPool

from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INVALID, LotproofError
from lotproof.runner.history.entry import RunEntry, RunRecord, read_run, run_key
from lotproof.runner.history.schema import (
    MIGRATIONS,
    SCHEMA_VERSION,
    TABLES,
    image_values,
    images,
    limits,
    runs,
    schema_version,
)
from lotproof.runner.record.layout import LEDGER_FILE

__all__ = [
    "BUSY_TIMEOUT_S",
    "CATALOGUE_FILE",
    "DB_ENV",
    "Catalogue",
    "CatalogueError",
    "NoCatalogueError",
    "RebuildReport",
    "catalogue_url",
    "find_run_folders",
    "rebuild",
    "record_run",
    "shown_url",
    "sqlite_file",
]

#: the SQLite catalogue's file name in a runs folder
CATALOGUE_FILE = "history.sqlite"
#: the environment variable that names the catalogue when ``--db`` does not
DB_ENV = "LOTPROOF_DB"
#: how long an SQLite writer waits for another writer's lock, in seconds
BUSY_TIMEOUT_S = 60.0
#: execution option that marks a connection as a writer (SQLite: BEGIN IMMEDIATE)
_WRITE = "lotproof_write"
#: rows per ``IN (...)`` list, well inside every database's limit on bound parameters
_CHUNK = 500
#: attempts of a write that met a concurrent writer's new rows (PostgreSQL)
_ATTEMPTS = 5


class CatalogueError(LotproofError, OSError):
    """The catalogue cannot be opened, read or written (exit 3); run folders are not affected."""

    exit_code = EXIT_BAD_INPUT


class NoCatalogueError(LotproofError, ValueError):
    """The catalogue the command names does not exist (exit 2: nothing was done)."""

    exit_code = EXIT_INVALID


# ---------------------------------------------------------------- which database


def catalogue_url(out: Path | str | None, db: str | None = None) -> str:
    """The SQLAlchemy URL of the catalogue: ``db``, else ``$LOTPROOF_DB``, else ``OUT/history.sqlite``."""
    text = db or os.environ.get(DB_ENV) or None
    if text is None:
        if out is None:
            raise NoCatalogueError("no catalogue named: give --db URL or a runs folder")
        return _sqlite_path_url(Path(out) / CATALOGUE_FILE)
    return _normalise(text)


def _sqlite_path_url(path: Path) -> str:
    return f"sqlite:///{Path(os.path.abspath(path)).as_posix()}"


def _normalise(text: str) -> str:
    text = text.strip()
    if "://" not in text:
        return _sqlite_path_url(Path(text))
    scheme, rest = text.split("://", 1)
    if scheme in ("postgresql", "postgres"):
        return f"postgresql+psycopg://{rest}"
    return text


def shown_url(url: str) -> str:
    """``url`` for people: the password hidden."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        return url


def sqlite_file(url: str) -> Path | None:
    """The file of an SQLite URL (None for another database, memory, or a ``file:`` URI)."""
    try:
        parsed = make_url(url)
    except ArgumentError:
        return None
    if parsed.get_backend_name() != "sqlite" or not parsed.database:
        return None
    if parsed.database == ":memory:" or parsed.database.startswith("file:"):
        return None
    return Path(parsed.database)


def _short(err: BaseException) -> str:
    """The first line of what a database said, without SQLAlchemy's statement and links."""
    cause = err.orig if isinstance(err, DBAPIError) and err.orig is not None else err
    lines = [line.strip() for line in str(cause).splitlines() if line.strip()]
    return lines[0] if lines else type(cause).__name__


# ---------------------------------------------------------------- the catalogue


def _as_utc(value: Any) -> Any:
    """Datetimes read back as aware UTC (SQLite keeps them without a zone; they are stored as UTC)."""
    if isinstance(value, datetime):
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)
    return value


def _chunks(items: list[str]) -> Iterator[list[str]]:
    for start in range(0, len(items), _CHUNK):
        yield items[start : start + _CHUNK]


class Catalogue:
    """An open catalogue; use as a context manager (or call :meth:`close`).

    Parameters
    ----------
    url
        A SQLAlchemy URL (see :func:`catalogue_url`).
    must_exist
        Refuse (:class:`NoCatalogueError`) an SQLite file that does not exist yet,
        instead of creating it: for commands that only read.

    Raises
    ------
    CatalogueError
        When the database cannot be reached or its schema cannot be brought up to
        date (or is newer than this lotproof knows).
    """

    def __init__(self, url: str, *, must_exist: bool = False, busy_timeout: float | None = None):
        self.url = url
        self.shown = shown_url(url)
        path = sqlite_file(url)
        if must_exist and path is not None and not path.is_file():
            raise NoCatalogueError(
                f"{path}: no catalogue here; `lotproof history --rebuild RUNS` builds one from "
                "the run folders"
            )
        if path is not None and not must_exist:
            try:
                path.parent.mkdir(parents=True, exist_ok=True)
            except OSError as err:
                raise CatalogueError(
                    f"{path.parent}: cannot make the folder ({err.strerror})"
                ) from None
        timeout = BUSY_TIMEOUT_S if busy_timeout is None else busy_timeout
        try:
            backend = make_url(url).get_backend_name()
            if backend == "sqlite":
                self._engine = create_engine(
                    url, poolclass=NullPool, connect_args={"timeout": timeout}
                )
                _configure_sqlite(self._engine)
            else:
                self._engine = create_engine(url, poolclass=NullPool)
        except ImportError as err:
            raise CatalogueError(
                f"{self.shown}: the database driver is not installed ({err}); "
                "`pip install lotproof[postgres]` adds PostgreSQL's"
            ) from None
        except (ArgumentError, SQLAlchemyError, ValueError) as err:
            raise CatalogueError(f"{self.shown}: not a catalogue URL ({_short(err)})") from None
        try:
            self.migrate()
        except CatalogueError:
            self._engine.dispose()
            raise
        except (SQLAlchemyError, OSError) as err:
            self._engine.dispose()
            raise CatalogueError(
                f"{self.shown}: cannot open the catalogue ({_short(err)})"
            ) from None

    def __enter__(self) -> Catalogue:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close every connection."""
        self._engine.dispose()

    # ------------------------------------------------------------ transactions

    @contextmanager
    def _reading(self) -> Iterator[Connection]:
        try:
            with self._engine.connect() as connection, connection.begin():
                yield connection
        except SQLAlchemyError as err:
            raise CatalogueError(
                f"{self.shown}: cannot read the catalogue ({_short(err)})"
            ) from None

    @contextmanager
    def _writing(self) -> Iterator[Connection]:
        with self._engine.connect() as connection:
            connection.execution_options(**{_WRITE: True})
            with connection.begin():
                yield connection

    def _version(self) -> int:
        with self._engine.connect() as connection, connection.begin():
            if not inspect(connection).has_table(schema_version.name):
                return 0
            found = connection.execute(select(schema_version.c.version)).scalars().all()
        return max(found, default=0)

    def migrate(self) -> int:
        """Bring the schema up to :data:`SCHEMA_VERSION` in one transaction; return the version.

        Concurrent openers of a new catalogue may race to create it; the loser's
        transaction is rolled back and it looks again.
        """
        for attempt in range(_ATTEMPTS):
            current = self._version()
            if current > SCHEMA_VERSION:
                raise CatalogueError(
                    f"{self.shown}: the catalogue's schema is version {current}, newer than "
                    f"this lotproof knows ({SCHEMA_VERSION}); use a newer lotproof"
                )
            if current == SCHEMA_VERSION:
                return current
            try:
                with self._writing() as connection:
                    schema_version.create(connection, checkfirst=True)
                    applied = (
                        connection.execute(select(schema_version.c.version).with_for_update())
                        .scalars()
                        .all()
                    )
                    current = max(applied, default=0)
                    for version, description, step in MIGRATIONS:
                        if version > current:
                            step(connection)
                            connection.execute(
                                insert(schema_version).values(
                                    version=version, description=description
                                )
                            )
                return SCHEMA_VERSION
            except (IntegrityError, DBAPIError):
                if attempt == _ATTEMPTS - 1:
                    raise
                time.sleep(0.05 * (attempt + 1))
        return SCHEMA_VERSION  # not reached

    # ------------------------------------------------------------ writing

    def record(self, entry: RunEntry) -> None:
        """Record one run (replacing what the catalogue had of it), in one transaction."""
        key = entry.run.run_dir
        for attempt in range(_ATTEMPTS):
            try:
                with self._writing() as connection:
                    self._delete(connection, [key])
                    connection.execute(insert(runs), [asdict(entry.run)])
                    for table, rows in (
                        (limits, entry.limits),
                        (images, entry.images),
                        (image_values, entry.values),
                    ):
                        if rows:
                            connection.execute(insert(table), [asdict(row) for row in rows])
                return
            except IntegrityError as err:
                # another writer recorded the same run between our delete and insert
                if attempt == _ATTEMPTS - 1:
                    raise CatalogueError(
                        f"{self.shown}: cannot record {key} ({_short(err)})"
                    ) from None
            except SQLAlchemyError as err:
                raise CatalogueError(f"{self.shown}: cannot record {key} ({_short(err)})") from None

    def forget(self, keys: Iterable[str]) -> int:
        """Remove runs (by :func:`~lotproof.runner.history.entry.run_key`); return how many were there."""
        keys = list(keys)
        if not keys:
            return 0
        try:
            with self._writing() as connection:
                return self._delete(connection, keys)
        except SQLAlchemyError as err:
            raise CatalogueError(f"{self.shown}: cannot remove runs ({_short(err)})") from None

    @staticmethod
    def _delete(connection: Connection, keys: list[str]) -> int:
        removed = 0
        for chunk in _chunks(keys):
            for table in reversed(TABLES):
                result = connection.execute(delete(table).where(table.c.run_dir.in_(chunk)))
                if table is runs:
                    removed += result.rowcount
        return removed

    # ------------------------------------------------------------ reading

    def runs(
        self,
        *,
        recipe: str | None = None,
        revision: int | None = None,
        verdict: str | None = None,
        status: str | None = None,
        since: datetime | None = None,
        until: datetime | None = None,
    ) -> list[RunRecord]:
        """Runs that match every filter given, newest first (runs without a start time last)."""
        query = select(runs)
        if recipe is not None:
            query = query.where(runs.c.recipe_name == recipe)
        if revision is not None:
            query = query.where(runs.c.recipe_revision == revision)
        if verdict is not None:
            query = query.where(runs.c.lot_verdict == verdict)
        if status is not None:
            query = query.where(runs.c.status == status)
        if since is not None:
            query = query.where(runs.c.started_utc >= since.astimezone(UTC))
        if until is not None:
            query = query.where(runs.c.started_utc <= until.astimezone(UTC))
        with self._reading() as connection:
            rows = connection.execute(query).mappings().all()
        found = [RunRecord(**{k: _as_utc(v) for k, v in row.items()}) for row in rows]
        earliest = datetime.min.replace(tzinfo=UTC)
        found.sort(
            key=lambda r: (r.started_utc is not None, r.started_utc or earliest, r.run_dir),
            reverse=True,
        )
        return found

    def keys(self) -> set[str]:
        """Every run folder the catalogue has."""
        with self._reading() as connection:
            return set(connection.execute(select(runs.c.run_dir)).scalars().all())

    def recipes(self) -> list[str]:
        """The recipe names of the catalogue's runs, sorted."""
        with self._reading() as connection:
            names = connection.execute(select(runs.c.recipe_name).distinct()).scalars().all()
        return sorted(n for n in names if n is not None)

    def limits(self, keys: Iterable[str]) -> dict[str, list[dict[str, Any]]]:
        """run key -> its limits (rows of ``limits`` as dicts, by name)."""
        out: dict[str, list[dict[str, Any]]] = {}
        with self._reading() as connection:
            for chunk in _chunks(sorted(set(keys))):
                found = connection.execute(select(limits).where(limits.c.run_dir.in_(chunk)))
                for row in found.mappings():
                    out.setdefault(row["run_dir"], []).append(dict(row))
        for rows in out.values():
            rows.sort(key=lambda r: r["name"])
        return out

    def value_names(self, keys: Iterable[str]) -> set[tuple[str, str, str]]:
        """(step, name, unit) of every per-image value the runs have."""
        found: set[tuple[str, str, str]] = set()
        with self._reading() as connection:
            for chunk in _chunks(sorted(set(keys))):
                query = (
                    select(image_values.c.step, image_values.c.name, image_values.c.unit)
                    .where(image_values.c.run_dir.in_(chunk))
                    .distinct()
                )
                found.update((s, n, u) for s, n, u in connection.execute(query))
        return found

    def values(
        self, keys: Iterable[str], step: str, name: str
    ) -> dict[str, list[tuple[str, float | None, str]]]:
        """run key -> (image, value, image status) of ``step.name``, by image."""
        out: dict[str, list[tuple[str, float | None, str]]] = {}
        joined = image_values.join(
            images,
            (images.c.run_dir == image_values.c.run_dir) & (images.c.image == image_values.c.image),
        )
        with self._reading() as connection:
            for chunk in _chunks(sorted(set(keys))):
                query = (
                    select(
                        image_values.c.run_dir,
                        image_values.c.image,
                        image_values.c.value,
                        images.c.status,
                    )
                    .select_from(joined)
                    .where(image_values.c.run_dir.in_(chunk))
                    .where(image_values.c.step == step)
                    .where(image_values.c.name == name)
                )
                for key, image, value, status in connection.execute(query):
                    out.setdefault(key, []).append((image, value, status))
        for rows in out.values():
            rows.sort(key=lambda r: r[0])
        return out

    def dump(self) -> dict[str, list[tuple[Any, ...]]]:
        """Every table's rows, each sorted by its primary key: for comparing two catalogues."""
        out: dict[str, list[tuple[Any, ...]]] = {}
        with self._reading() as connection:
            for table in (schema_version, *TABLES):
                names = [c.name for c in table.columns]
                key = [names.index(c.name) for c in table.primary_key.columns]
                rows = [
                    tuple(_as_utc(v) for v in row)
                    for row in connection.execute(select(*table.columns))
                ]
                rows.sort(key=_by_columns(key))
                out[table.name] = rows
        return out


def _by_columns(columns: list[int]) -> Callable[[tuple[Any, ...]], tuple[Any, ...]]:
    """A sort key: the values of a row at ``columns`` (a table's primary key)."""

    def key(row: tuple[Any, ...]) -> tuple[Any, ...]:
        return tuple(row[i] for i in columns)

    return key


def _configure_sqlite(engine: Engine) -> None:
    """WAL journal, and transactions begun by us: BEGIN IMMEDIATE for writers, BEGIN for readers.

    Python's sqlite3 module would begin transactions itself, late and deferred; a
    deferred writer that finds another writer holding the lock cannot wait for it.
    This is SQLAlchemy's documented set-up for pysqlite transactions.
    """

    @event.listens_for(engine, "connect")
    def _connect(dbapi_connection: Any, _record: Any) -> None:
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute("PRAGMA journal_mode=WAL")
        except Exception:  # a read-only catalogue keeps the journal it has
            pass
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _begin(connection: Connection) -> None:
        writer = connection.get_execution_options().get(_WRITE, False)
        connection.exec_driver_sql("BEGIN IMMEDIATE" if writer else "BEGIN")


# ---------------------------------------------------------------- recording and rebuilding


def record_run(run_dir: Path, url: str, *, expected_seal: str | None = None) -> RunRecord:
    """Read one finished run folder and record it in the catalogue at ``url``; return its row.

    Raises
    ------
    CatalogueError
        When the catalogue cannot be opened or written. The run folder is only read.
    """
    entry = read_run(run_dir, expected_seal=expected_seal)
    with Catalogue(url) as catalogue:
        catalogue.record(entry)
    return entry.run


def find_run_folders(folder: Path) -> list[Path]:
    """The run folders in ``folder`` (folders with a ledger), or ``folder`` itself if it is one."""
    folder = Path(folder)
    if (folder / LEDGER_FILE).exists():
        return [folder]
    found = []
    for child in sorted(folder.iterdir()):
        if child.name.startswith(".") or child.is_symlink() or not child.is_dir():
            continue
        if (child / LEDGER_FILE).exists():
            found.append(child)
    return found


@dataclass
class RebuildReport:
    """What :func:`rebuild` did: the runs recorded (in folder order) and the keys removed."""

    recorded: list[RunRecord] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)

    def counts(self) -> dict[str, int]:
        """Recorded runs by status (intact, altered, unfinished)."""
        out: dict[str, int] = {}
        for record in self.recorded:
            out[record.status] = out.get(record.status, 0) + 1
        return out


def rebuild(catalogue: Catalogue, folders: Iterable[Path]) -> RebuildReport:
    """Record every run folder found in ``folders`` again, and forget runs there that are gone.

    Each run is read and verified from its folder (an altered or unfinished run is
    recorded as such, without values) and written in its own transaction, so runs
    finishing meanwhile are not held up. Runs the catalogue has from other folders
    (another station's, in a shared catalogue) are left as they are.

    Raises
    ------
    NoCatalogueError
        When a folder does not exist (nothing was changed).
    """
    folders = [Path(f) for f in folders]
    for folder in folders:
        if not folder.is_dir():
            raise NoCatalogueError(f"{folder}: not a folder of run folders")
    report = RebuildReport()
    seen: set[str] = set()
    for folder in folders:
        for run_dir in find_run_folders(folder):
            entry = read_run(run_dir)
            if entry.run.run_dir in seen:
                continue
            seen.add(entry.run.run_dir)
            catalogue.record(entry)
            report.recorded.append(entry.run)
    prefixes = [run_key(folder) for folder in folders]
    stale = sorted(
        key
        for key in catalogue.keys() - seen
        if any(key == p or key.startswith(p.rstrip(os.sep) + os.sep) for p in prefixes)
    )
    catalogue.forget(stale)
    report.removed = stale
    return report
