"""Fixtures shared by the test modules; the builders behind them are in ``_builders.py``.

``record``
    A finished run folder of :data:`_builders.RECORD_RECIPE` over two
    :func:`_builders.spot_column` images (1 and 2 spots), made once per module
    by :func:`_builders.spot_record`. Only for tests that read it.
``record_copy``
    A copy of ``record`` in the test's own ``tmp_path`` (same folder name), for
    tests that alter a record: edit, truncate, sign or flip bytes.
``keys``
    An Ed25519 key pair (``lab.key``, ``lab.pub``) made by ``keygen``, once per module.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from lotproof.runner.record.signing import keygen

from _builders import copy_run, spot_record


@pytest.fixture(scope="module")
def record(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return spot_record(tmp_path_factory.mktemp("record"))


@pytest.fixture()
def record_copy(record: Path, tmp_path: Path) -> Path:
    return copy_run(record, tmp_path)


@pytest.fixture(scope="module")
def keys(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("keys")
    private, public = folder / "lab.key", folder / "lab.pub"
    keygen(private, public)
    return private, public
