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
    RUN/ledger.sha256    the sha256 of the whole ledger, in ``sha256sum -c`` form
    RUN/SHA256SUMS       every output file, in ``sha256sum -c`` form
    RUN/seal.sig         the Ed25519 signature of the seal, when signed
    RUN/approvals.jsonl  review and release records, added after the run: beside the sealed
                         files, never one of them (each chained and signed; checked by verify)

A validation study (``lotproof validate PLAN``) writes a study folder, sealed the
same way (``ledger.jsonl``, ``SHA256SUMS``, ``report.html``), with its own files::

    STUDY/plan.yaml           exact bytes of the validation plan
    STUDY/recipe.yaml         exact bytes of the recipe the plan names
    STUDY/design/precision.csv, design/trueness.csv   the plan's design tables, as given
    STUDY/variants/PARAM.minus.yaml, PARAM.plus.yaml  the recipe with one parameter moved
    STUDY/measurements.csv    one row per image: set, part, operator, replicate, values
    STUDY/robustness.csv      one row per (moved parameter, image): values and verdicts
    STUDY/validation.json     every statistic, the criteria and the study verdict

Image ids are paths in the lot (``sub/disc-01.tif``); inside the run folder they
become safe names: the extension dropped, every character outside
``A-Z a-z 0-9 . _ -`` replaced by ``_``, ``..`` parts dropped. Kept results keep
the sub-folders (``kept/sub/disc-01/clean.tif``); figures flatten them with
``__`` (``figures/sub__disc-01.overlay.png``). Two images of a lot whose safe
names would be the same, ignoring case (``a b.tif`` and ``a_b.tif``), each get
the first 8 hex digits of the sha256 of their id appended (``a_b-1c0f3e2a``):
:func:`image_folders` is a function of the lot's ids alone, so whoever reads the
run folder finds the same names, and the ledger's ``image`` events record them.
"""

from __future__ import annotations

import hashlib
import os
import re
from collections.abc import Iterable, Mapping
from datetime import datetime
from pathlib import Path, PurePosixPath

__all__ = [
    "APPROVALS_FILE",
    "BESIDE_THE_SEAL",
    "DESIGN_FOLDER",
    "FIGURES_FOLDER",
    "IMAGES_FILE",
    "INPUTS_FILE",
    "KEPT_FOLDER",
    "LEDGER_FILE",
    "LEDGER_SUM_FILE",
    "MEASUREMENTS_FILE",
    "OBJECTS_FILE",
    "PLAN_FILE",
    "RECIPE_FILE",
    "REPORT_FILE",
    "RESOLVED_FILE",
    "ROBUSTNESS_FILE",
    "SIGNATURE_FILE",
    "STEPS_FILE",
    "SUMS_FILE",
    "TABLES_FILE",
    "VALIDATION_FILE",
    "VARIANTS_FOLDER",
    "VERDICTS_FILE",
    "design_path",
    "figure_path",
    "image_folder",
    "image_folders",
    "inside_run_folder",
    "is_within",
    "kept_path",
    "run_folder_name",
    "safe_name",
    "safe_relative",
    "variant_path",
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
#: the sha256 of the whole ledger, written just before its last line; covers that line
LEDGER_SUM_FILE = "ledger.sha256"
SUMS_FILE = "SHA256SUMS"
SIGNATURE_FILE = "seal.sig"
APPROVALS_FILE = "approvals.jsonl"
#: the files of a run folder that no output event records: the ledger itself and what is
#: added beside the sealed files (the ledger's own sum, the seal's signature, the approvals)
BESIDE_THE_SEAL = (LEDGER_FILE, LEDGER_SUM_FILE, SIGNATURE_FILE, APPROVALS_FILE)
KEPT_FOLDER = "kept"
FIGURES_FOLDER = "figures"
PLAN_FILE = "plan.yaml"
MEASUREMENTS_FILE = "measurements.csv"
ROBUSTNESS_FILE = "robustness.csv"
VALIDATION_FILE = "validation.json"
DESIGN_FOLDER = "design"
VARIANTS_FOLDER = "variants"

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


def image_folders(image_ids: Iterable[str]) -> dict[str, str]:
    """The safe folder name of every image of a lot, unique within the lot.

    Names that would clash (the same, ignoring case, since a file system may ignore it)
    each get ``-`` and the first 8 hex digits of the sha256 of the image id appended.
    The names depend on the set of ids only, never on their order.
    """
    ids = sorted(set(image_ids))
    plain = {image_id: image_folder(image_id) for image_id in ids}
    seen: dict[str, int] = {}
    for name in plain.values():
        # kept results keep sub-folders, figures flatten them: either form may clash
        for key in {name.lower(), name.replace("/", "__").lower()}:
            seen[key] = seen.get(key, 0) + 1
    out = {}
    for image_id, name in plain.items():
        clash = seen[name.lower()] > 1 or seen[name.replace("/", "__").lower()] > 1
        digest = hashlib.sha256(image_id.encode("utf-8")).hexdigest()[:8]
        out[image_id] = f"{name}-{digest}" if clash else name
    return out


def kept_path(
    image_id: str, step: str, suffix: str, folders: Mapping[str, str] | None = None
) -> str:
    """``kept/IMAGE/STEP.suffix`` (POSIX, relative to the run folder); suffix ``tif`` or ``csv``.

    ``folders`` is the lot's :func:`image_folders`; without it, the plain safe name.
    """
    folder = folders[image_id] if folders is not None else image_folder(image_id)
    return f"{KEPT_FOLDER}/{folder}/{safe_name(step)}.{suffix}"


def figure_path(image_id: str, name: str, folders: Mapping[str, str] | None = None) -> str:
    """``figures/IMAGE.NAME.png`` (POSIX, relative to the run folder); name ``thumbnail`` or ``overlay``.

    ``folders`` is the lot's :func:`image_folders`; without it, the plain safe name.
    """
    folder = folders[image_id] if folders is not None else image_folder(image_id)
    return f"{FIGURES_FOLDER}/{folder.replace('/', '__')}.{name}.png"


def design_path(part: str) -> str:
    """``design/PART.csv``: the copy of a plan's design table (``precision`` or ``trueness``)."""
    return f"{DESIGN_FOLDER}/{safe_name(part)}.csv"


def variant_path(parameter: str, direction: str) -> str:
    """``variants/STEP.PARAM.DIRECTION.yaml``: the recipe with one parameter moved (minus, plus)."""
    return f"{VARIANTS_FOLDER}/{safe_name(parameter)}.{safe_name(direction)}.yaml"


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
