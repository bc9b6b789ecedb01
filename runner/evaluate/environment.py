"""What a run records about the machine and software it ran on.

A rerun on another machine compares these to explain a difference: a changed
library version, another CPU whose SIMD features change the last bits of float
results, another Python.
"""

from __future__ import annotations

import getpass
import importlib
import platform
import socket
import sys
from datetime import UTC, datetime
from typing import Any

from lotproof.runner import __version__
from lotproof.runner.evaluate.hashing import library_versions

__all__ = ["LIBRARIES", "cpu_info", "environment", "environment_differences", "utc_now"]

#: distributions whose versions every run records
LIBRARIES = (
    "numpy",
    "scipy",
    "scikit-image",
    "tifffile",
    "pillow",
    "pydantic",
    "PyYAML",
    "networkx",
    "rfc8785",
    "numba",
    "llvmlite",
    "matplotlib",
    "cryptography",
    "opencv-python-headless",
)


def utc_now() -> str:
    """The current time, UTC, ISO 8601 with seconds and a Z."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def cpu_info() -> dict[str, Any]:
    """CPU model and the SIMD features numpy was able to use."""
    model = platform.processor() or ""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as handle:
            for line in handle:
                if line.startswith("model name"):
                    model = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    return {"model": model, "machine": platform.machine(), "numpy_simd": _numpy_simd()}


def _numpy_simd() -> list[str]:
    """The SIMD extensions numpy found on this CPU, from its compiled core (which has no stubs)."""
    # older numpy keeps the table in numpy.core
    for module in ("numpy._core._multiarray_umath", "numpy.core._multiarray_umath"):
        try:
            table = importlib.import_module(module).__cpu_features__
        except (ImportError, AttributeError):
            continue
        return sorted(name for name, present in table.items() if present)
    return []


def _user() -> str | None:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no name for this uid
        return None


def environment() -> dict[str, Any]:
    """The ``run-start`` fields: tool, python, libraries, platform, cpu, command, user, host."""
    return {
        "tool": {"name": "lotproof", "version": __version__},
        "python": {
            "version": platform.python_version(),
            "implementation": platform.python_implementation(),
        },
        "libraries": library_versions(LIBRARIES),
        "platform": {
            "system": platform.system(),
            "release": platform.release(),
            "machine": platform.machine(),
        },
        "cpu": cpu_info(),
        "command": list(sys.argv),
        "user": _user(),
        "host": socket.gethostname() or None,
        "time_utc": utc_now(),
    }


def environment_differences(recorded: dict[str, Any], current: dict[str, Any]) -> list[str]:
    """What differs between a recorded ``run-start`` and now, in words."""
    out = []
    if recorded.get("tool") != current.get("tool"):
        out.append(
            f"lotproof {recorded.get('tool', {}).get('version')} -> {current['tool']['version']}"
        )
    old_py = recorded.get("python", {}).get("version")
    if old_py != current["python"]["version"]:
        out.append(f"Python {old_py} -> {current['python']['version']}")
    old_libs = recorded.get("libraries", {})
    for name, version in current["libraries"].items():
        if old_libs.get(name) != version:
            out.append(f"{name} {old_libs.get(name, 'not recorded')} -> {version}")
    old_cpu = recorded.get("cpu", {})
    if old_cpu.get("model") != current["cpu"]["model"]:
        out.append(f"CPU {old_cpu.get('model')!r} -> {current['cpu']['model']!r}")
    if old_cpu.get("numpy_simd") != current["cpu"]["numpy_simd"]:
        gained = sorted(set(current["cpu"]["numpy_simd"]) - set(old_cpu.get("numpy_simd", [])))
        lost = sorted(set(old_cpu.get("numpy_simd", [])) - set(current["cpu"]["numpy_simd"]))
        out.append(
            f"SIMD features differ (gained {gained or 'none'}, lost {lost or 'none'}); "
            "float results may differ in their last bits"
        )
    old_platform = recorded.get("platform", {})
    if old_platform.get("machine") != current["platform"]["machine"]:
        out.append(f"machine {old_platform.get('machine')} -> {current['platform']['machine']}")
    return out
