"""The names inside a run folder, in one place: files, kept results, figures.

Layout (see DESIGN.md, "Run record")::

    RUN/recipe.yaml      exact bytes of the recipe as run
    RUN/resolved.json    every parameter with defaults filled and lengths in pixels
    RUN/images.csv       one row per image: status, reason, values, verdicts
    RUN/objects.csv      one row per object of every per-object table
    RUN/tables.csv       rows of other tables (e.g. size-spectrum classes), when there are any
    RUN/inputs.json      every input file: path, size, sha256, shape, dtype, calibration
    RUN/steps.csv        every (image, step): cache key, result checksum, computed or reused
    RUN/verdicts.json    every limit and the lot verdict
    RUN/kept/IMAGE/STEP.tif|.csv                   results of steps marked keep: true
    RUN/figures/IMAGE.thumbnail.png, IMAGE.overlay.png   for people to look at
    RUN/report.html      the self-contained customer report
    RUN/ledger.jsonl     the hash-chained record of everything above
    RUN/SHA256SUMS       every output file, in ``sha256sum -c`` form
    RUN/seal.sig         the Ed25519 signature of the seal, when signed
    RUN/approvals.jsonl  review and release records, added after the run: beside the sealed
                         files, never one of them (each chained and signed; checked by verify)

Image ids are paths in the lot (``sub/disc-01.tif``); inside the run folder they
become safe names: the extension dropped, every character outside
``A-Z a-z 0-9 . _ -`` replaced by ``_``, ``..`` parts dropped. Kept results keep
the sub-folders (``kept/sub/disc-01/clean.tif``); figures flatten them with
``__`` (``figures/sub__disc-01.overlay.png``).
"""

from __future__ import annotations

import os
import re
from datetime import datetime
from pathlib import Path, PurePosixPath

__all__ = [
    "APPROVALS_FILE",
    "BESIDE_THE_SEAL",
    "FIGURES_FOLDER",
    "IMAGES_FILE",
    "INPUTS_FILE",
    "KEPT_FOLDER",
    "LEDGER_FILE",
    "OBJECTS_FILE",
    "RECIPE_FILE",
    "REPORT_FILE",
    "RESOLVED_FILE",
    "SIGNATURE_FILE",
    "STEPS_FILE",
    "SUMS_FILE",
    "TABLES_FILE",
    "VERDICTS_FILE",
    "figure_path",
    "image_folder",
    "inside_run_folder",
    "is_within",
    "kept_path",
    "run_folder_name",
    "safe_name",
    "safe_relative",
]

RECIPE_FILE = "recipe.yaml"
RESOLVED_FILE = "resolved.json"
IMAGES_FILE = "images.csv"
OBJECTS_FILE = "objects.csv"
TABLES_FILE = "tables.csv"
INPUTS_FILE = "inputs.json"
STEPS_FILE = "steps.csv"
VERDICTS_FILE = "verdicts.json"
REPORT_FILE = "report.html"
LEDGER_FILE = "ledger.jsonl"
SUMS_FILE = "SHA256SUMS"
SIGNATURE_FILE = "seal.sig"
APPROVALS_FILE = "approvals.jsonl"
#: the files of a run folder that no output event records: the ledger itself and what is
#: added beside the sealed files after the run (the seal's signature, the approvals)
BESIDE_THE_SEAL = (LEDGER_FILE, SIGNATURE_FILE, APPROVALS_FILE)
KEPT_FOLDER = "kept"
FIGURES_FOLDER = "figures"

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_name(text: str, replacement: str = "_") -> str:
    """``text`` with every run of characters outside ``A-Z a-z 0-9 . _ -`` replaced."""
    return _UNSAFE.sub(replacement, text)


def run_folder_name(recipe_name: str, revision: int, now: datetime) -> str:
    """``<UTC time>-<name>-r<revision>``, e.g. ``20261201T214500Z-filter-disc-porosity-r4``."""
    return f"{now.strftime('%Y%m%dT%H%M%SZ')}-{safe_name(recipe_name, '-')}-r{int(revision)}"


def image_folder(image_id: str) -> str:
    """The safe relative folder of an image's kept results: ``sub/disc-01`` for ``sub/disc-01.tif``."""
    stem = image_id.rsplit(".", 1)[0] if "." in Path(image_id).name else image_id
    parts = [(safe_name(p) or "_") for p in stem.split("/") if p not in ("", ".", "..")]
    return "/".join(parts) or "_"


def kept_path(image_id: str, step: str, suffix: str) -> str:
    """``kept/IMAGE/STEP.suffix`` (POSIX, relative to the run folder); suffix ``tif`` or ``csv``."""
    return f"{KEPT_FOLDER}/{image_folder(image_id)}/{safe_name(step)}.{suffix}"


def figure_path(image_id: str, name: str) -> str:
    """``figures/IMAGE.NAME.png`` (POSIX, relative to the run folder); name ``thumbnail`` or ``overlay``."""
    return f"{FIGURES_FOLDER}/{image_folder(image_id).replace('/', '__')}.{name}.png"


def safe_relative(name: str) -> PurePosixPath | None:
    """``name`` as a relative POSIX path inside a folder, or None when it would leave it."""
    if not name or "\\" in name or "\n" in name or "\r" in name or "\x00" in name:
        return None
    path = PurePosixPath(name)
    if path.is_absolute() or any(p in ("..", "") for p in path.parts) or path.parts[:1] == (".",):
        return None
    if path.as_posix() != name:
        return None
    return path


def is_within(folder: Path, path: Path) -> bool:
    """Whether ``path`` is ``folder`` or lies inside it, links resolved."""
    inner = Path(os.path.abspath(path)).resolve()
    outer = Path(os.path.abspath(folder)).resolve()
    return inner == outer or outer in inner.parents


def inside_run_folder(path: Path) -> Path | None:
    """The run folder that contains ``path`` (a folder with a ledger), or None."""
    resolved = Path(os.path.abspath(path)).resolve()
    for folder in resolved.parents:
        if (folder / LEDGER_FILE).exists():
            return folder
    return None
