"""Content checksums and cache keys.

* Canonical JSON is RFC 8785 (the JSON Canonicalization Scheme, via ``rfc8785``):
  plain ``json.dumps(sort_keys=True)`` differs on ``1.0``, ``-0.0`` and big integers.
  Floats that JSON cannot hold (NaN, infinities) never enter it: values are
  written as their exact ``float.hex`` text.
* An array's checksum is the sha256 of a canonical header (dtype, shape) followed
  by its C-order bytes. Nothing is ever pickled.
* A step result's key is the sha256 of canonical JSON of the step kind, its
  implementation version, its parameters with defaults filled and lengths in
  pixels, the pixel size, the keys of its inputs (in order) and the versions of
  the libraries it uses. Step names never enter a key, so renaming a step or
  reordering YAML keys keeps every key.
* An input's key is the sha256 of canonical JSON of its file's sha256 and its
  calibration.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping
from functools import cache
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import rfc8785

from lotproof.steps import Output, StepParams, Table

__all__ = [
    "KEY_FORMAT",
    "NOT_INSTALLED",
    "canonical_json",
    "content_checksum",
    "file_sha256",
    "float_text",
    "hash_array",
    "input_key",
    "library_versions",
    "step_key",
]

#: bumped when the layout of a key's JSON changes: every key changes with it
KEY_FORMAT = "lotproof-key/1"


def canonical_json(obj: Any) -> bytes:
    """RFC 8785 canonical JSON bytes of ``obj``."""
    return rfc8785.dumps(obj)


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def file_sha256(path: Path) -> str:
    """sha256 hex of a file's bytes, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def float_text(value: float) -> str:
    """The exact text of a float (``float.hex``), also for NaN and infinities."""
    return float(value).hex()


def hash_array(array: np.ndarray) -> str:
    """sha256 of dtype + shape + C-order bytes."""
    array = np.ascontiguousarray(array)
    digest = hashlib.sha256()
    digest.update(canonical_json({"dtype": array.dtype.str, "shape": list(array.shape)}))
    digest.update(b"\x00")
    digest.update(array.data.cast("B") if array.size else b"")
    return digest.hexdigest()


def content_checksum(data: Any) -> str:
    """The checksum of a step result: an array, a :class:`Table` or an :class:`Output`."""
    if isinstance(data, np.ndarray):
        return hash_array(data)
    if isinstance(data, Table):
        described: dict[str, Any] = {
            "table": [
                [name, data.units[name], hash_array(np.asarray(column))]
                for name, column in data.columns.items()
            ]
        }
        if not data.per_object:  # per-object tables keep the checksum they always had
            described["per_object"] = False
        return _sha256(canonical_json(described))
    if isinstance(data, Output):
        return _sha256(
            canonical_json(
                {
                    "data": content_checksum(data.data),
                    "values": {k: float_text(v) for k, v in data.values.items()},
                    "units": dict(data.units),
                }
            )
        )
    raise TypeError(f"cannot checksum a {type(data).__name__}")


#: the version recorded for a library that is not installed
NOT_INSTALLED = "not installed"


@cache
def _version(distribution: str) -> str:
    try:
        return metadata.version(distribution)
    except metadata.PackageNotFoundError:
        return NOT_INSTALLED


_DISTRIBUTIONS = {"skimage": "scikit-image", "cv2": "opencv-python-headless", "yaml": "PyYAML"}


def library_versions(libraries: Iterable[str]) -> dict[str, str]:
    """Installed versions of ``libraries`` (import or distribution names)."""
    names = sorted({_DISTRIBUTIONS.get(lib, lib) for lib in libraries} | {"numpy"})
    return {name: _version(name) for name in names}


def input_key(file_sha256: str, calibration: Mapping[str, Any]) -> str:
    """Key of one input: its bytes' checksum and its calibration."""
    return _sha256(
        canonical_json(
            {"format": KEY_FORMAT, "file_sha256": file_sha256, "calibration": dict(calibration)}
        )
    )


def step_key(
    kind: str,
    version: str,
    params: StepParams,
    spacing: tuple[float, ...],
    inputs: list[str],
    libraries: Mapping[str, str],
) -> str:
    """Key of one step result (see the module docstring)."""
    return _sha256(
        canonical_json(
            {
                "format": KEY_FORMAT,
                "kind": kind,
                "version": version,
                "params": params.model_dump(mode="json"),
                "spacing_um": [float_text(s) for s in spacing],
                "inputs": list(inputs),
                "libraries": dict(libraries),
            }
        )
    )
