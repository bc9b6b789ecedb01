"""``lotproof preview``: a contact sheet of every step of a recipe on one image.

This is for the recipe's author, to tune a threshold or a radius by looking: the
recipe runs on ONE image (through the cache, like a run) and every step's result
is drawn as a labelled tile, in run order, after the recipe's inputs:

* gray images stretched between their 0.5th and 99.5th percentiles;
* masks white on black (a shrunk block shows its fraction of foreground as gray);
* labels, each object its own colour;
* tables and values: the outlines of the objects they measured drawn over the
  first input, with the values listed beside the picture.

Under each tile: the step's name, its kind and the parameters the recipe sets
(lengths also in pixels). Beside the PNG goes a sidecar JSON (same name,
``.json``) listing every tile with its box on the sheet, so a test or a script
can find a tile without looking at pixels.

The sheet is a matplotlib figure (Agg, matplotlib's own default style, never the
user's ``matplotlibrc``) whose tiles are axes laid out in a grid; pictures are
placed pixel for pixel (``figimage``, no resampling) and the sidecar's boxes are
read back from that layout. The PNG carries no software version or date, so the
same recipe, image and library versions give the same bytes.

Nothing here writes into a run folder; the sheet is a working file for the author.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.image import FigureImage
from matplotlib.patches import Rectangle
from matplotlib.text import Text
from matplotlib.transforms import Affine2D, Bbox, Transform

from lotproof.runner.errors import EXIT_INVALID, InputError, LotproofError
from lotproof.runner.evaluate.cache import Store
from lotproof.runner.evaluate.image import ImageResult, analyse_sample, resolve_params
from lotproof.runner.evaluate.inputs import Sample, find_samples, read_image
from lotproof.runner.evaluate.pictures import (
    labels_display,
    mask_display,
    outline_overlay,
    to_display,
)
from lotproof.runner.files import write_file
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.recipe.model import Recipe
from lotproof.runner.show.figures import PNG_METADATA, default_style
from lotproof.steps import REGISTRY, Area, Length, Table

if TYPE_CHECKING:
    from matplotlib.axes import Axes

__all__ = [
    "SIDECAR_FORMAT",
    "TILE_SIDE",
    "PreviewError",
    "PreviewSheet",
    "make_preview",
    "write_preview",
]

#: the ``format`` of the sidecar JSON
SIDECAR_FORMAT = "lotproof-preview/1"
#: side of the square box a tile's picture is fitted into, in pixels
TILE_SIDE = 256
#: tiles per row of the sheet
COLUMNS = 2

_PAD = 16
_SIDE_W = 262  # the text beside a picture
_CAPTION_LINES = 4
_LINE = 16
_SMALL_LINE = 14
_HEADER = 84
_CELL_W = TILE_SIDE + _PAD + _SIDE_W
_CELL_H = TILE_SIDE + 8 + _CAPTION_LINES * _LINE
_BACKGROUND = (250, 250, 248)
_EMPTY = (214, 214, 210)
_INK = (27, 27, 27)
_MUTED = (96, 96, 96)
#: dots per inch of the figure: 72, so a point is a pixel of the PNG
_DPI = 72
#: the sheet's fonts: size in pixels and weight (matplotlib's default sans-serif)
_FONTS = {
    "title": (17, "bold"),
    "name": (13, "bold"),
    "text": (12, "normal"),
    "small": (11, "normal"),
}
#: an RGB picture of a tile
Picture = npt.NDArray[np.uint8]


class PreviewError(LotproofError, ValueError):
    """The preview cannot be made as asked (unknown step, bad output name): exit 2."""

    exit_code = EXIT_INVALID


@dataclass
class _Tile:
    """A tile to draw: its sidecar entry (given its boxes when drawn) and what it shows."""

    entry: dict[str, Any]
    picture: Picture | None
    #: lines beside the picture: the values, then what the data is
    side: list[str]
    #: 'key: value' texts under the picture
    params: list[str]


@dataclass
class PreviewSheet:
    """A contact sheet: the PNG's bytes, its sidecar document, and the image's result."""

    png: bytes
    sidecar: dict[str, Any]
    result: ImageResult
    tiles: list[dict[str, Any]] = field(default_factory=list)


# ---------------------------------------------------------------- which image, which steps


def _sample_for(recipe: Recipe, image: Path) -> tuple[Sample, Path]:
    """The lot sample that holds ``image`` (its folder is taken as the lot)."""
    if not image.is_file():
        raise InputError(f"{image}: no such image file")
    lot = image.parent
    try:
        samples = find_samples(lot, recipe.inputs)
    except InputError:
        samples = []
    target = image.resolve()
    for sample in samples:
        if any(path.resolve() == target for path in sample.files.values()):
            return sample, lot
    if len(recipe.inputs) == 1:
        # a file the input's glob does not match is still worth a look
        return Sample(id=image.name, files={next(iter(recipe.inputs)): image}), lot
    globs = ", ".join(f"{n} ({g!r})" for n, g in recipe.inputs.items())
    raise PreviewError(f"{image}: matches none of the recipe's inputs {globs}")


def _chosen_steps(recipe: Recipe, steps: list[str] | None) -> list[str]:
    if not steps:
        return list(recipe.order)
    problems = []
    for name in steps:
        if name in recipe.unused:
            problems.append(f"{name!r} is not run: no limit, measure or keep needs it")
        elif name not in recipe.order:
            import difflib

            close = difflib.get_close_matches(name, list(recipe.steps), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            problems.append(f"no step {name!r} in the recipe{hint}")
    if problems:
        raise PreviewError("--steps: " + "; ".join(problems))
    return [name for name in recipe.order if name in steps]


# ---------------------------------------------------------------- text of a tile


def _quantity_text(value: Any, resolved: Any) -> str:
    text = str(value)
    if (
        isinstance(resolved, (Length, Area))
        and resolved is not value
        and resolved.unit != value.unit
    ):
        text += f" = {_short(resolved.value)} {resolved.unit}"
    return text


def _short(value: Any) -> str:
    if isinstance(value, bool) or value is None:
        return str(value)
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    value = float(value)
    if not math.isfinite(value):
        return "undefined"
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return format(value, ".5g")


def _param_lines(
    recipe: Recipe, name: str, spacing: tuple[float, ...] | None
) -> tuple[list[str], dict[str, Any]]:
    """'key: value' texts of the parameters the recipe sets, and the same as JSON."""
    step = recipe.steps[name]
    params = step.params
    try:
        resolved = resolve_params(params, spacing) if spacing else params
    except ValueError:
        resolved = params
    written = [f for f in type(params).model_fields if f in params.model_fields_set]
    texts, as_json = [], {}
    dumped = params.model_dump(mode="json")
    for field_name in written:
        value = getattr(params, field_name)
        if isinstance(value, (Length, Area)):
            texts.append(f"{field_name}: {_quantity_text(value, getattr(resolved, field_name))}")
        else:
            texts.append(f"{field_name}: {_short(value) if isinstance(value, float) else value}")
        as_json[field_name] = dumped[field_name]
    return texts, as_json


def _table_lines(table: Table) -> list[str]:
    lines = [f"table, {table.n_rows} rows; median (min to max):"]
    for column, data in table.columns.items():
        if column == "label":
            continue
        values = np.asarray(data, dtype=np.float64)
        values = values[np.isfinite(values)]
        unit = table.units.get(column, "-")
        unit = "" if unit == "-" else f" {unit}"
        if values.size == 0:
            lines.append(f"{column}: none")
            continue
        lines.append(
            f"{column}: {_short(np.median(values))} ({_short(values.min())} to {_short(values.max())}){unit}"
        )
    return lines


def _data_lines(data: Any, kind: str) -> list[str]:
    if isinstance(data, Table):
        return _table_lines(data)
    if not isinstance(data, np.ndarray):
        return [kind]
    shape = " \u00d7 ".join(str(s) for s in data.shape)
    lines = [f"{kind}, {shape}, {data.dtype}"]
    if data.ndim == 3 and not (kind == "image" and data.shape[-1] in (3, 4)):
        lines.append(f"middle slice ({data.shape[0] // 2}) shown")
    if data.size == 0:
        return lines
    if kind == "mask":
        lines.append(
            f"foreground: {_short(100 * float(np.count_nonzero(data)) / data.size)} % of pixels"
        )
    elif kind == "labels":
        lines.append(f"objects: {int(np.unique(data[data > 0]).size)}")
    else:
        finite = data[np.isfinite(data)] if data.dtype.kind == "f" else data
        if finite.size:
            lines.append(f"values {_short(finite.min())} to {_short(finite.max())}")
    return lines


# ---------------------------------------------------------------- pictures


def _fit(picture: np.ndarray) -> np.ndarray:
    """Enlarge a small picture by a whole factor (nearest pixel) so it fills the box better."""
    factor = max(1, TILE_SIDE // max(picture.shape[:2]))
    if factor > 1:
        picture = np.repeat(np.repeat(picture, factor, axis=0), factor, axis=1)
    return picture


def _picture(
    data: Any, kind: str, first_image: np.ndarray | None, source: Any = None, source_kind: str = ""
) -> np.ndarray | None:
    """RGB uint8 picture of a tile, at most TILE_SIDE on its longer side, or None."""
    if isinstance(data, np.ndarray):
        if kind == "mask":
            gray = mask_display(data, TILE_SIDE)
        elif kind == "labels":
            return _fit(labels_display(data, TILE_SIDE))
        else:
            gray = to_display(data, TILE_SIDE)
        return _fit(np.repeat(gray[..., None], 3, axis=-1))
    # a table or values: outline what was measured over the first input
    if (
        isinstance(source, np.ndarray)
        and first_image is not None
        and source_kind in ("mask", "labels")
    ):
        return _fit(outline_overlay(first_image, source, TILE_SIDE))
    return None


# ---------------------------------------------------------------- drawing the sheet


def _hex(rgb: tuple[int, int, int]) -> str:
    return "#%02x%02x%02x" % rgb


class _Writer:
    """Text on the sheet, placed and measured in the PNG's pixels (font sizes in pixels too)."""

    def __init__(self, fig: Figure) -> None:
        # measures text as the sheet draws it; never drawn itself (not added to the figure)
        self.probe = Text(parse_math=False)
        self.probe.set_figure(fig)

    def width(self, text: str, font: str) -> float:
        size, weight = _FONTS[font]
        self.probe.set_text(text)
        self.probe.set_fontsize(size * 72 / _DPI)
        self.probe.set_fontweight(weight)
        return self.probe.get_window_extent().width

    def clip(self, text: str, font: str, width: float) -> str:
        """``text``, cut and ended with '…' where it is wider than ``width`` pixels."""
        if self.width(text, font) <= width:
            return text
        while text and self.width(text + "\u2026", font) > width:
            text = text[:-1]
        return text + "\u2026"

    def wrap(self, parts: list[str], font: str, width: float, lines: int) -> list[str]:
        """Join ``parts`` with ', ' into at most ``lines`` lines of ``width`` pixels."""
        out: list[str] = []
        current = ""
        for part in parts:
            candidate = f"{current}, {part}" if current else part
            if self.width(candidate, font) <= width or not current:
                current = candidate
            else:
                out.append(current + ",")
                current = part
        if current:
            out.append(current)
        if len(out) > lines:
            out = out[: lines - 1] + [self.clip(" ".join(out[lines - 1 :]), font, width)]
        return [self.clip(line, font, width) for line in out]

    def put(
        self,
        where: Axes | Figure,
        at: Transform,
        x: float,
        y: float,
        text: str,
        font: str,
        colour: tuple[int, int, int],
    ) -> None:
        """``text`` with its top left corner at (x, y) pixels of ``at``; never read as mathtext."""
        size, weight = _FONTS[font]
        where.text(
            x,
            y,
            text,
            transform=at,
            fontsize=size * 72 / _DPI,
            fontweight=weight,
            color=_hex(colour),
            ha="left",
            va="top",
            parse_math=False,
            clip_on=False,
        )


def _top_left(width: float, height: float, parent: Transform) -> Transform:
    """Pixels of a ``width`` x ``height`` area from its top left corner, y downwards, onto ``parent``."""
    return Affine2D().scale(1 / width, -1 / height).translate(0, 1) + parent


def _png_box(bbox: Bbox, sheet_height: int) -> list[int]:
    """A box in display pixels (y upwards) as [left, top, right, bottom] pixels of the PNG."""
    return [
        round(bbox.x0),
        round(sheet_height - bbox.y1),
        round(bbox.x1),
        round(sheet_height - bbox.y0),
    ]


def _draw(header: list[str], tiles: list[_Tile]) -> tuple[bytes, tuple[int, int]]:
    """The sheet as PNG bytes and its size; every tile's ``box`` and ``picture`` filled in.

    Each tile is an axes of the figure (no frame, no axis) in a grid; its text and
    frame are drawn in it, its picture is placed unresampled with ``figimage``. The
    boxes of the sidecar are read back from that layout, in the PNG's pixels.
    """
    rows = max(1, math.ceil(len(tiles) / COLUMNS))
    width = _PAD + COLUMNS * (_CELL_W + _PAD)
    height = _HEADER + rows * (_CELL_H + _PAD) + _PAD
    with default_style():
        fig = Figure(figsize=(width / _DPI, height / _DPI), dpi=_DPI, facecolor=_hex(_BACKGROUND))
        FigureCanvasAgg(fig)
        # every picture drawn on its own, pixel for pixel, never merged into one image
        fig.suppressComposite = True
        writer = _Writer(fig)
        sheet = _top_left(width, height, fig.transFigure)
        title = writer.clip(header[0], "title", width - 2 * _PAD)
        writer.put(fig, sheet, _PAD, 12, title, "title", _INK)
        for i, line in enumerate(header[1:3]):
            text = writer.clip(line, "small", width - 2 * _PAD)
            writer.put(fig, sheet, _PAD, 36 + i * _SMALL_LINE, text, "small", _MUTED)
        placed: list[tuple[_Tile, Axes, FigureImage | None]] = []
        for index, tile in enumerate(tiles):
            row, col = divmod(index, COLUMNS)
            x0 = _PAD + col * (_CELL_W + _PAD)
            y0 = _HEADER + row * (_CELL_H + _PAD)
            cell = fig.add_axes(
                (x0 / width, 1 - (y0 + _CELL_H) / height, _CELL_W / width, _CELL_H / height),
                frameon=False,
            )
            cell.set_axis_off()
            placed.append((tile, cell, _draw_tile(fig, cell, writer, tile)))
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png", dpi=_DPI, metadata=PNG_METADATA)
        for tile, cell, image in placed:
            tile.entry["box"] = _png_box(cell.get_window_extent(), height)
            if image is None:
                tile.entry["picture"] = None
                continue
            # where the picture is drawn, pixel for pixel; the extent counts pixel centres
            left, right, bottom, top = image.get_extent()
            tile.entry["picture"] = _png_box(
                Bbox.from_extents(left + 0.5, bottom + 0.5, right + 0.5, top + 0.5), height
            )
    return buffer.getvalue(), (width, height)


def _draw_tile(fig: Figure, cell: Axes, writer: _Writer, tile: _Tile) -> FigureImage | None:
    """One tile in its axes: framed picture, text beside and under it; the picture's artist."""
    at = _top_left(_CELL_W, _CELL_H, cell.transAxes)
    # the frame is one pixel wide, just outside the picture's box
    cell.add_patch(
        Rectangle(
            (-0.5, -0.5),
            TILE_SIDE + 1,
            TILE_SIDE + 1,
            transform=at,
            facecolor=_hex(_EMPTY),
            edgecolor=_hex(_MUTED),
            linewidth=72 / _DPI,
            antialiased=False,
            snap=False,  # the edges lie on pixel centres already
            clip_on=False,
        )
    )
    image = None
    if tile.picture is not None:
        h, w = tile.picture.shape[:2]
        corner = cell.get_window_extent()
        # figimage counts from the sheet's lower left corner
        image = fig.figimage(
            tile.picture,
            xo=round(corner.x0) + (TILE_SIDE - w) // 2,
            yo=round(corner.y1) - (TILE_SIDE - h) // 2 - h,
            origin="upper",
            interpolation="nearest",
            zorder=2,
        )
    else:
        text = "no picture: " + tile.entry["data"]
        writer.put(cell, at, 12, TILE_SIDE // 2 - 8, text, "text", _MUTED)
    # beside the picture: what the data is, and the step's values
    side_x = TILE_SIDE + _PAD
    max_side_lines = (_CELL_H - 4) // _SMALL_LINE
    side = tile.side
    if len(side) > max_side_lines:
        side = side[: max_side_lines - 1] + [f"\u2026 and {len(side) - max_side_lines + 1} more"]
    for i, line in enumerate(side):
        writer.put(
            cell, at, side_x, i * _SMALL_LINE, writer.clip(line, "small", _SIDE_W), "small", _INK
        )
    # under the picture: name, kind and parameters
    caption_y = TILE_SIDE + 6
    title = f"{tile.entry['name']}  \u00b7  {tile.entry['kind']}"
    writer.put(
        cell, at, 0, caption_y, writer.clip(title, "name", TILE_SIDE + _SIDE_W), "name", _INK
    )
    lines = writer.wrap(
        tile.params or ["defaults only"], "text", TILE_SIDE + _SIDE_W, _CAPTION_LINES - 1
    )
    for i, line in enumerate(lines):
        writer.put(cell, at, 0, caption_y + (i + 1) * _LINE, line, "text", _MUTED)
    return image


# ---------------------------------------------------------------- the sheet


def _json_number(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def make_preview(
    recipe: Recipe | str | Path,
    image: str | Path,
    *,
    steps: list[str] | None = None,
    store: Store | None = None,
) -> PreviewSheet:
    """Run ``recipe`` on ``image`` and draw the contact sheet (nothing is written).

    Parameters
    ----------
    recipe
        A recipe, or the path of one (validated first).
    image
        One image file; its folder is the lot it is taken from (the recipe's
        other inputs are looked for beside it).
    steps
        Names of the steps to draw (default: every step the recipe runs).
    store
        The cache (``None``: compute everything, store nothing).

    Raises
    ------
    PreviewError
        A step in ``steps`` is unknown or not run by the recipe.
    InputError
        The image cannot be read, or a step fails on it.
    """
    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    image = Path(image)
    chosen = _chosen_steps(recipe, steps)
    sample, lot = _sample_for(recipe, image)
    sources = [recipe.steps[n].to[0] for n in chosen if recipe.kinds.get(n) in ("table", "values")]
    capture = tuple(dict.fromkeys(chosen + [s for s in sources if s in recipe.order]))
    result = analyse_sample(recipe, sample, lot, store=store, capture=capture)
    if result.status != "ok":
        raise InputError(f"{sample.id}: {result.reason}")
    inputs = {
        name: read_image(path, lot, lossy=recipe.lossy_input).data
        for name, path in sample.files.items()
    }
    first_image = next(iter(inputs.values()))
    tiles: list[_Tile] = []
    for name, data in inputs.items():
        entry: dict[str, Any] = {
            "name": name,
            "role": "input",
            "kind": "input",
            "data": "image",
            "params": {"glob": recipe.inputs[name]},
        }
        params = [f"file: {Path(sample.files[name]).name}", f"glob: {recipe.inputs[name]}"]
        picture = _picture(data, "image", None)
        tiles.append(_Tile(entry, picture, _data_lines(data, "image"), params))
    for name in chosen:
        step = recipe.steps[name]
        kind = recipe.kinds.get(name, "image")
        out = result.kept.get(name)
        source_name = step.to[0]
        source = inputs.get(source_name, result.kept.get(source_name))
        # in the order the step kind declares them: a cached result keeps no order of its own
        values = {
            v: (result.values[(name, v)], result.units[(name, v)])
            for v in REGISTRY[step.kind].values
            if (name, v) in result.values
        }
        side = [f"  {v} = {_short(x)}{'' if u == '-' else ' ' + u}" for v, (x, u) in values.items()]
        # the values first: they are what limits read; then what the data is
        side = (["values:"] + side if side else []) + (
            _data_lines(out, kind) if out is not None else [kind]
        )
        param_texts, params_json = _param_lines(recipe, name, result.spacing)
        entry = {
            "name": name,
            "role": "step",
            "kind": step.kind,
            "data": kind,
            "to": list(step.to),
            "params": params_json,
            "values": {v: {"value": _json_number(x), "unit": u} for v, (x, u) in values.items()},
        }
        if isinstance(out, Table):
            entry["rows"] = out.n_rows
        picture = _picture(out, kind, first_image, source, recipe.kinds.get(source_name, ""))
        tiles.append(_Tile(entry, picture, side, param_texts))
    spacing = result.spacing or ()
    header = [
        f"{recipe.name} r{recipe.revision}  \u00b7  {sample.id}",
        f"pixel size {' x '.join(_short(s) for s in spacing)} um  \u00b7  recipe sha256 {recipe.sha256}",
        ("not run (nothing needs them): " + ", ".join(recipe.unused))
        if recipe.unused
        else "every step the recipe runs is shown"
        if not steps
        else f"steps shown: {', '.join(chosen)}",
    ]
    png, size = _draw(header, tiles)
    entries = [tile.entry for tile in tiles]
    counts = {"computed": 0, "reused": 0}
    for record in result.steps:
        counts["computed" if record.cache == "computed" else "reused"] += 1
    sidecar = {
        "format": SIDECAR_FORMAT,
        "recipe": {"name": recipe.name, "revision": recipe.revision, "sha256": recipe.sha256},
        "image": sample.id,
        "pixel_size_um": list(spacing),
        "sheet": {"width": size[0], "height": size[1], "columns": COLUMNS, "tile_side": TILE_SIDE},
        "tiles": entries,
        "not_run": list(recipe.unused),
        "steps": counts,
    }
    return PreviewSheet(png, sidecar, result, entries)


def write_preview(
    recipe: Recipe | str | Path,
    image: str | Path,
    out: str | Path,
    *,
    steps: list[str] | None = None,
    store: Store | None = None,
) -> PreviewSheet:
    """:func:`make_preview`, then write ``out`` (a ``.png``) and its sidecar ``.json`` beside it.

    Both files are replaced if they exist (written to a temporary file, then renamed).
    """
    out = Path(out)
    if out.suffix.lower() != ".png":
        raise PreviewError(f"--out {out}: the contact sheet is a PNG; name it *.png")
    sheet = make_preview(recipe, image, steps=steps, store=store)
    text = json.dumps(sheet.sidecar, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    _write_atomic(out, sheet.png)
    _write_atomic(out.with_suffix(".json"), text.encode("utf-8"))
    return sheet


def _write_atomic(path: Path, data: bytes) -> None:
    try:
        write_file(path, data, replace=True, durable=False)
    except OSError as err:
        raise InputError(f"{path}: cannot write ({err.strerror})") from None
