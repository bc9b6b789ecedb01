"""Fixtures of the catalogue tests: a throw-away PostgreSQL server, catalogues, small lots.

``postgres_server`` (session) makes a new cluster with the server binaries of
Debian's ``postgresql`` package (``/usr/lib/postgresql/*/bin``) in a temporary
folder, listening only on a unix socket there, and removes it at the end.
``initdb`` and ``postgres`` refuse to run as root, so as root they run as the
``postgres`` user. Without the binaries the PostgreSQL tests fail when ``CI`` is
set (CI must have them: ``.ci/run`` installs the package) and are skipped
otherwise.

``catalogue_url`` is parametrised: every test that takes it runs once on an SQLite
file and once on a new PostgreSQL database.
"""

from __future__ import annotations

import itertools
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest
from history_support import LOT_PLAN, RERUN_LOT, LotRuns, PostgresServer, make_lot, make_recipe

PG_GLOB = "/usr/lib/postgresql/*/bin"


def _server_bindir() -> Path | None:
    import glob

    def version(path: str) -> tuple[int, ...]:
        part = Path(path).parent.name
        return tuple(int(p) for p in part.split(".") if p.isdigit())

    for folder in sorted(glob.glob(PG_GLOB), key=version, reverse=True):
        bindir = Path(folder)
        if (bindir / "initdb").is_file() and (bindir / "pg_ctl").is_file():
            return bindir
    return None


def _free_port() -> int:
    # the port only names the socket file (.s.PGSQL.PORT); a free TCP port keeps it unique
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _missing(message: str) -> None:
    if os.environ.get("CI"):
        pytest.fail(f"{message}; CI must run the PostgreSQL tests (.ci/run installs postgresql)")
    pytest.skip(message)


@pytest.fixture(scope="session")
def postgres_server() -> Iterator[PostgresServer]:
    bindir = _server_bindir()
    if bindir is None:
        _missing(f"no PostgreSQL server binaries in {PG_GLOB} (Debian: apt-get install postgresql)")
    assert bindir is not None
    as_user: list[str] = []
    owner: pwd.struct_passwd | None = None
    if os.geteuid() == 0:  # initdb and postgres refuse to run as root
        try:
            owner = pwd.getpwnam("postgres")
        except KeyError:
            _missing("running as root and there is no 'postgres' user to run the server as")
        as_user = ["runuser", "-u", "postgres", "--"]
    base = Path(tempfile.mkdtemp(prefix="lotproof-pg-"))
    data, sockets, log = base / "data", base / "sock", base / "server.log"
    sockets.mkdir()
    if owner is not None:
        for path in (base, sockets):
            os.chown(path, owner.pw_uid, owner.pw_gid)
    port = _free_port()

    def run(*command: str) -> None:
        subprocess.run([*as_user, *command], check=True, capture_output=True, timeout=300)

    started = False
    try:
        run(
            str(bindir / "initdb"),
            "-D",
            str(data),
            "-U",
            "postgres",
            "-A",
            "trust",
            "-E",
            "UTF8",
            "--locale=C",
            "--no-sync",
        )
        options = f"-k {sockets} -p {port} -c listen_addresses='' -c fsync=off"
        run(str(bindir / "pg_ctl"), "-D", str(data), "-o", options, "-l", str(log), "-w", "start")
        started = True
        yield PostgresServer(sockets, port, bindir)
    except subprocess.CalledProcessError as err:
        text = (err.stderr or b"").decode(errors="replace")
        if log.exists():
            text += log.read_text(errors="replace")
        pytest.fail(f"the PostgreSQL test server did not start: {text.strip()}")
    finally:
        if started:
            subprocess.run(
                [
                    *as_user,
                    str(bindir / "pg_ctl"),
                    "-D",
                    str(data),
                    "-m",
                    "immediate",
                    "-w",
                    "stop",
                ],
                capture_output=True,
                timeout=120,
            )
        shutil.rmtree(base, ignore_errors=True)


_numbers = itertools.count(1)


@pytest.fixture
def postgres_database(postgres_server: PostgresServer) -> Iterator[str]:
    """A new, empty database on the test server; its URL."""
    name = f"catalogue_{os.getpid()}_{next(_numbers)}"
    postgres_server.admin(f'CREATE DATABASE "{name}"')
    yield postgres_server.url(name)
    postgres_server.admin(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture(params=["sqlite", "postgresql"])
def catalogue_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """The URL of a new catalogue: an SQLite file, then a PostgreSQL database."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'catalogue' / 'history.sqlite'}"
    return str(request.getfixturevalue("postgres_database"))


@pytest.fixture(scope="session")
def lot_runs(tmp_path_factory: pytest.TempPathFactory) -> LotRuns:
    from lotproof import load_recipe, run_lot
    from lotproof.runner.lot.local import LocalExecutor

    root = tmp_path_factory.mktemp("lot-runs")
    recipes = {
        1: make_recipe(root / "recipes", revision=1, max_fraction=0.05),
        2: make_recipe(root / "recipes", revision=2, max_fraction=0.03),
    }
    loaded = {revision: load_recipe(path) for revision, path in recipes.items()}
    out = root / "runs"
    executor = LocalExecutor(1)
    lots: dict[str, Path] = {}
    runs: list[Path] = []
    for name, revision, spots in LOT_PLAN:
        lots[name] = make_lot(root / "lots", name, spots)
        summary = run_lot(loaded[revision], lots[name], out, executor=executor)
        assert summary.catalogue is not None and summary.notes == []
        runs.append(summary.run_dir)
    summary = run_lot(loaded[1], lots[RERUN_LOT], out, executor=executor)
    runs.append(summary.run_dir)
    return LotRuns(root, out, recipes, lots, runs)
