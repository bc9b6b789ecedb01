"""Small synthetic lots, recipe texts and recorded runs shared by the tests.

Plain functions, for builders a test calls with its own parameters; ``conftest.py``
turns the ones many tests share unchanged into fixtures. Every image is drawn
deterministically (a literal layout or a seeded generator), so a builder gives
the same bytes on every call.

Images
    :func:`spot_image` bright squares on a dark uint8 field, in rows of a grid;
    :func:`spot_column` its 32x32 layout of one column; :func:`noisy_squares`
    seeded uint8 noise with bright squares at seeded places; :func:`noisy_discs`
    a seeded uint16 field with bright discs at seeded places.
Lots
    :func:`write_lot` a lot folder of TIFF files from named arrays;
    :func:`spot_lot` ``disc-00.tif``, ``disc-01.tif``, ... with a given number of
    spots each; :func:`seeded_lot` ``count`` images drawn from seeds 0, 1, ...
Recipes
    :func:`recipe_text` the text of a threshold-and-measure recipe;
    :func:`write_recipe` a recipe file; :data:`RECORD_RECIPE` the recipe of
    :func:`spot_record`.
Runs and repositories
    :func:`spot_record` a finished (or unfinished) run folder of a two-image lot;
    :func:`copy_run` a copy of a run folder to alter; :func:`git` git in a test
    repository, with a fixed author and no signing.
"""

from __future__ import annotations

import shutil
import subprocess
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

import numpy as np
import tifffile

from lotproof import run_lot
from lotproof.runner.record.layout import LEDGER_FILE

# ---------------------------------------------------------------- images


def spot_image(
    n_spots: int,
    *,
    frame: int = 64,
    origin: int = 8,
    pitch: int = 16,
    columns: int = 3,
    side: int = 4,
    grow: int = 0,
) -> np.ndarray:
    """A ``frame`` x ``frame`` uint8 image: ``n_spots`` bright squares (200) on a dark field (20).

    Spot ``i`` has its top left corner at row ``origin + pitch * (i // columns)``,
    column ``origin + pitch * (i % columns)``, and side ``side + grow * i``. The
    defaults give 4x4 squares three to a row on 64x64 pixels: area fraction
    ``16 * n_spots / 4096``.
    """
    image = np.full((frame, frame), 20, np.uint8)
    for i in range(n_spots):
        y, x = origin + pitch * (i // columns), origin + pitch * (i % columns)
        size = side + grow * i
        image[y : y + size, x : x + size] = 200
    return image


def spot_column(n_spots: int) -> np.ndarray:
    """32x32 with ``n_spots`` bright 4x4 squares in one column: area fraction n * 16 / 1024."""
    return spot_image(n_spots, frame=32, origin=4, pitch=8, columns=1)


def noisy_squares(
    seed: int, *, side: int, count: int, square: int, bright: int, corners: tuple[int, int]
) -> np.ndarray:
    """``side`` x ``side`` uint8 noise in [0, 60) with ``count`` bright squares at seeded places.

    Each square is ``square`` pixels on a side, of value ``bright``, with its top
    left corner drawn from ``[corners[0], corners[1])`` along each axis.
    """
    rng = np.random.default_rng(seed)
    image = rng.integers(0, 60, (side, side)).astype(np.uint8)
    for _ in range(count):
        y, x = rng.integers(*corners, 2)
        image[y : y + square, x : x + square] = bright
    return image


def noisy_discs(
    seed: int,
    *,
    side: int,
    count: int,
    centres: tuple[int, int],
    radii: tuple[int, int],
    add: float,
) -> np.ndarray:
    """``side`` x ``side`` uint16: normal noise (mean 1000, sd 20) with ``count`` discs ``add`` brighter.

    Centres are drawn from ``[centres[0], centres[1])`` along each axis, radii from
    ``[radii[0], radii[1])`` pixels.
    """
    rng = np.random.default_rng(seed)
    image = rng.normal(1000, 20, (side, side))
    yy, xx = np.mgrid[:side, :side]
    for _ in range(count):
        cy, cx, r = rng.integers(*centres, 2).tolist() + [int(rng.integers(*radii))]
        image[(yy - cy) ** 2 + (xx - cx) ** 2 <= r * r] += add
    return image.clip(0, 65535).astype(np.uint16)


# ---------------------------------------------------------------- lots


def write_lot(folder: Path, images: Mapping[str, np.ndarray], *, name: str = "lot") -> Path:
    """A new lot folder ``folder / name`` holding each array as a TIFF file under its name.

    A name may hold sub-folders (``sub/b.tif``); they are made.
    """
    lot = folder / name
    lot.mkdir()
    for file, image in images.items():
        (lot / file).parent.mkdir(parents=True, exist_ok=True)
        tifffile.imwrite(lot / file, image)
    return lot


def spot_lot(
    folder: Path,
    spots: Sequence[int],
    *,
    draw: Callable[[int], np.ndarray] = spot_image,
    name: str = "lot",
) -> Path:
    """A lot of ``disc-00.tif``, ``disc-01.tif``, ...: image ``i`` is ``draw(spots[i])``."""
    return write_lot(folder, {f"disc-{i:02d}.tif": draw(n) for i, n in enumerate(spots)}, name=name)


def seeded_lot(
    folder: Path,
    count: int,
    draw: Callable[[int], np.ndarray],
    *,
    names: str = "img-{:02d}.tif",
    name: str = "lot",
) -> Path:
    """A lot of ``count`` images: ``names.format(i)`` holds ``draw(i)`` for i = 0, 1, ..."""
    return write_lot(folder, {names.format(i): draw(i) for i in range(count)}, name=name)


# ---------------------------------------------------------------- recipes


def recipe_text(
    name: str,
    *,
    revision: int = 1,
    pattern: str = "*.tif",
    gray: bool = False,
    background: str | None = None,
    method: str = "fixed",
    keep: bool = False,
    clean: bool = False,
    connectivity: int | None = 8,
    max_fraction: float = 0.5,
    lot_mean: bool = False,
) -> str:
    """The text of a recipe that thresholds one input (``section``) and measures the mask.

    Steps, in this order, each only when asked for: ``luma`` (gray, ``gray``),
    ``level`` (subtract-background of bright features, radius ``background``),
    ``spots`` (threshold: ``fixed`` at level 100, or ``otsu``; kept with ``keep``),
    ``clean`` (open, radius 0.5 um, ``clean``), ``stats`` (measure, with
    ``connectivity`` unless ``None``). Limits: ``fraction`` (area fraction per
    image at most ``max_fraction``) and, with ``lot_mean``, ``mean-fraction`` (the
    lot mean at most 1). Pixels are 0.5 um.
    """
    steps = []
    source = "section"
    if gray:
        steps.append(f"  luma:\n    apply: gray\n    to: {source}\n")
        source = "luma"
    if background is not None:
        steps.append(
            f"  level:\n    apply: subtract-background\n    to: {source}\n"
            f"    features: bright\n    radius: {background}\n"
        )
        source = "level"
    level = "\n    level: 100" if method == "fixed" else ""
    kept = "\n    keep: true" if keep else ""
    steps.append(
        f"  spots:\n    apply: threshold\n    to: {source}\n    method: {method}{level}{kept}\n"
    )
    measured = "spots"
    if clean:
        steps.append("  clean:\n    apply: open\n    to: spots\n    radius: 0.5 um\n")
        measured = "clean"
    joined = f"\n    connectivity: {connectivity}" if connectivity is not None else ""
    steps.append(f"  stats:\n    apply: measure\n    to: {measured}{joined}\n")
    limits = f"  fraction:\n    value: stats.area_fraction\n    max: {max_fraction}\n"
    if lot_mean:
        limits += (
            "  mean-fraction:\n    value: stats.area_fraction\n    over: lot-mean\n    max: 1\n"
        )
    return (
        "format: lotproof/1\n"
        f"name: {name}\n"
        f"revision: {revision}\n"
        "pixel_size: 0.5 um\n"
        "inputs:\n"
        f'  section: "{pattern}"\n'
        "steps:\n" + "".join(steps) + "limits:\n" + limits
    )


def write_recipe(folder: Path, text: str, name: str = "recipe.yaml") -> Path:
    """``text`` written to ``folder / name`` (replacing what was there)."""
    path = folder / name
    path.write_text(text)
    return path


#: the recipe of :func:`spot_record`: fixed threshold, spots kept, area fraction at most 0.5
RECORD_RECIPE = recipe_text("spot-test", revision=2, keep=True)


# ---------------------------------------------------------------- runs


def spot_record(folder: Path, spots: Sequence[int] = (1, 2), *, finish: bool = True) -> Path:
    """The run folder of :data:`RECORD_RECIPE` over a :func:`spot_column` lot, made by ``run_lot``.

    The lot (``folder / "lot"``) holds ``disc-00.tif``, ... with ``spots`` squares;
    the run goes under ``folder / "runs"``. With ``finish=False`` the ledger is cut
    before its first output event, as if the run had stopped before recording its
    files.
    """
    lot = spot_lot(folder, spots, draw=spot_column)
    run = run_lot(write_recipe(folder, RECORD_RECIPE), lot, folder / "runs").run_dir
    if not finish:
        lines = (run / LEDGER_FILE).read_bytes().splitlines(keepends=True)
        first_output = next(i for i, line in enumerate(lines) if b'"type":"output"' in line)
        (run / LEDGER_FILE).write_bytes(b"".join(lines[:first_output]))
    return run


def copy_run(run: Path, dest: Path, name: str | None = None) -> Path:
    """A copy of the run folder ``run`` as ``dest / name`` (default: the run folder's own name)."""
    target = dest / (name if name is not None else run.name)
    shutil.copytree(run, target)
    return target


def git(repo: Path, *args: str) -> str:
    """``git -C repo ARGS`` with a fixed author and no commit signing; its stripped stdout."""
    done = subprocess.run(
        [
            "git",
            "-C",
            str(repo),
            "-c",
            "user.name=t",
            "-c",
            "user.email=t@t",
            "-c",
            "commit.gpgsign=false",
            *args,
        ],
        capture_output=True,
        check=True,
        text=True,
    )
    return done.stdout.strip()


# ---------------------------------------------------------------- signers


def signers(folder: Path, names: Sequence[str] = ("reviewer", "releaser")) -> dict[str, Path]:
    """Ed25519 key pairs for people who sign: ``folder/NAME.key`` each, public keys in a trust folder.

    Returns every private key by name, and the trust folder (``folder/trust``, one
    ``NAME.pub`` a person) under ``"trust"``.
    """
    from lotproof.runner.record.signing import keygen

    found = {"trust": folder / "trust"}
    for name in names:
        keygen(folder / f"{name}.key", folder / "trust" / f"{name}.pub")
        found[name] = folder / f"{name}.key"
    return found
