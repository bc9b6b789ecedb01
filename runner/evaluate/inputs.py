"""Finding a lot's images and reading them, read-only, with their calibration.

Volumes: a multi-page TIFF (one slice a page) or a TIFF holding a 3-D array is
read as a volume ``(z, y, x)``. Its voxel size comes, most trusted first, from
OME-XML ``PhysicalSizeX/Y/Z`` (with units, default um), from the ``unit`` and
``spacing`` (along z) keys of the key=value text that much microscopy software
writes into the TIFF ImageDescription, with the resolution tags for x and y, or
not at all (a volume without a z spacing is uncalibrated); the recipe's
``pixel_size`` / ``voxel_size`` and its ``calibration`` rule decide what is
used (see ``lotproof.runner.evaluate.image``).

A lot is a folder. Each recipe input is a glob inside it. With one input every
matching file is one image of the lot. With several inputs, files are paired by
what their wildcards matched (``*_bright.tif`` and ``*_dark.tif`` pair
``a_bright.tif`` with ``a_dark.tif``); a file without its partners makes that
image incomplete.

Every file is read once into memory (bounded by :data:`MAX_FILE_BYTES`), hashed,
and decoded from that copy, so the checksum recorded is the checksum of the bytes
analysed. Nothing is ever written into the lot folder.

A file is refused (its image is incomplete, with the reason) when it is empty,
larger than :data:`MAX_FILE_BYTES`, a symbolic link loop or a link leading out
of the lot; when its content is not what its name says; when it is cut short
(every strip, every page the IFD chain or the description promises, and the
whole extent of a contiguous series must lie in the file); when its header
claims more than :data:`MAX_PIXELS` pixels (checked from the header, before any
pixel is decoded; Pillow's decompression-bomb limit is set to the same number);
when it is not 2-D or 3-D, smaller than :data:`MIN_SIDE` along an axis, of an
unsupported pixel type, holds NaN or infinite values, or has no contrast (every
pixel the same: a blank frame would otherwise measure as "no objects" and pass
a ``max`` limit). A tifffile logger warning is a refusal, never ignored.
"""

from __future__ import annotations

import hashlib
import io
import logging
import math
import os
import re
import stat
import warnings
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np

from lotproof.runner.errors import InputError
from lotproof.runner.recipe.lotsheet import LOT_SHEET
from lotproof.runner.recipe.patterns import check_pattern, glob_to_regex
from lotproof.steps.units import FILE_LENGTH_UNITS, LENGTH_UNITS

__all__ = [
    "JPEG_SUFFIXES",
    "MAX_FILE_BYTES",
    "MAX_PIXELS",
    "MIN_SIDE",
    "PNG_SUFFIXES",
    "TIFF_SUFFIXES",
    "Calibration",
    "LoadedImage",
    "Sample",
    "find_samples",
    "read_image",
]

#: a single input file larger than this is refused before it is read
MAX_FILE_BYTES = 2 * 1024**3
#: an image with more pixels than this is refused before its data is decoded
MAX_PIXELS = 512 * 1024**2
#: images smaller than this along any spatial axis are refused
MIN_SIDE = 4
TIFF_SUFFIXES = (".tif", ".tiff")
PNG_SUFFIXES = (".png",)
JPEG_SUFFIXES = (".jpg", ".jpeg")
#: resolutions that mean "not calibrated": screen and print defaults, in dots per inch
_DEFAULT_DPI = (1.0, 72.0, 96.0, 150.0, 300.0, 600.0)


@dataclass(frozen=True)
class Calibration:
    """Pixel size per spatial axis in micrometres (``None``: not calibrated)."""

    pixel_size_um: tuple[float, ...] | None
    source: str

    def as_dict(self) -> dict[str, Any]:
        return {
            "pixel_size_um": list(self.pixel_size_um) if self.pixel_size_um else None,
            "source": self.source,
        }


@dataclass
class LoadedImage:
    path: str  # relative to the lot, POSIX separators
    size: int
    sha256: str
    data: np.ndarray
    is_color: bool
    calibration: Calibration

    def describe(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "size": self.size,
            "sha256": self.sha256,
            "shape": list(self.data.shape),
            "dtype": str(self.data.dtype),
            "color": self.is_color,
            "calibration": self.calibration.as_dict(),
        }


@dataclass
class Sample:
    """One image of the lot: its id and a file per recipe input (or the reason it has none)."""

    id: str
    files: dict[str, Path] = field(default_factory=dict)
    problem: str = ""


# ---------------------------------------------------------------- finding files


def find_samples(lot: Path, inputs: dict[str, str]) -> list[Sample]:
    """The images of ``lot`` for the recipe's ``inputs``, sorted by id.

    Raises
    ------
    InputError
        When the lot folder does not exist or a glob is refused.
    """
    if not lot.exists():
        raise InputError(f"{lot}: no such lot folder")
    if not lot.is_dir():
        raise InputError(f"{lot}: a lot is a folder of images, this is a file")
    root = lot.resolve()
    matches: dict[str, dict[tuple[str, ...], Path]] = {}
    for name, pattern in inputs.items():
        refused = check_pattern(pattern)
        if refused:
            raise InputError(f"input {name!r} ({pattern!r}): {refused}")
        regex = glob_to_regex(pattern.replace("\\", "/"))
        found: dict[tuple[str, ...], Path] = {}
        for path in sorted(lot.glob(pattern)):
            try:
                if path.is_dir():
                    continue
            except OSError:
                pass  # a symlink loop: keep it, reading will say what is wrong
            rel = path.relative_to(lot).as_posix()
            if rel == LOT_SHEET:
                continue  # the lot's details, never an image of it
            m = regex.match(rel)
            key = m.groups() if m else (rel,)
            found[key] = path
        matches[name] = found
    names = list(inputs)
    first = names[0]
    keys = set().union(*(set(m) for m in matches.values()))
    samples = []
    for key in sorted(keys):
        present = {n: matches[n][key] for n in names if key in matches[n]}
        ident_path = present.get(first) or next(iter(present.values()))
        sample = Sample(id=ident_path.relative_to(lot).as_posix(), files=present)
        missing = [n for n in names if n not in present]
        if missing:
            sample.problem = f"no file for input(s) {', '.join(missing)}"
        samples.append(sample)
    del root
    samples.sort(key=lambda s: s.id)
    return samples


# ---------------------------------------------------------------- reading


class _TiffWarnings(logging.Handler):
    def __init__(self) -> None:
        super().__init__(level=logging.WARNING)
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


def _read_bytes(path: Path, shown: str) -> bytes:
    try:
        # O_NOFOLLOW is not used: symlinks inside the lot are allowed; the caller
        # checks that the resolved file lies inside the lot. O_NONBLOCK: a pipe under an
        # image's name opens at once (and is refused below) instead of waiting for a writer.
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_BINARY", 0))
    except OSError as err:
        if err.errno == 40:  # ELOOP
            raise InputError(f"{shown}: symbolic link loop") from None
        raise InputError(f"{shown}: cannot open ({err.strerror})") from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise InputError(f"{shown}: not a regular file (a pipe, a device or a socket)")
        if info.st_size > MAX_FILE_BYTES:
            raise InputError(
                f"{shown}: {info.st_size} bytes is more than the {MAX_FILE_BYTES} bytes "
                "lotproof reads from one file"
            )
        if info.st_size == 0:
            raise InputError(f"{shown}: the file is empty (0 bytes)")
        os.set_blocking(fd, True)
        with os.fdopen(fd, "rb", closefd=False) as handle:
            data = handle.read(MAX_FILE_BYTES + 1)
    except OSError as err:
        raise InputError(f"{shown}: cannot read ({err.strerror})") from None
    finally:
        os.close(fd)
    return data


def _check_pixels(shape: tuple[int, ...], itemsize: int, shown: str) -> None:
    pixels = math.prod(shape)
    if pixels > MAX_PIXELS:
        raise InputError(
            f"{shown}: {pixels} pixels (shape {shape}) is more than the {MAX_PIXELS} pixels "
            "lotproof analyses in one image"
        )


def _ome_calibration(xml: str) -> Calibration | None:
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return None
    for element in root.iter():
        if element.tag.endswith("Pixels"):
            sizes = []
            for axis in ("Z", "Y", "X"):
                value = element.get(f"PhysicalSize{axis}")
                if value is None:
                    if axis == "Z":
                        continue
                    return None
                unit = element.get(f"PhysicalSize{axis}Unit", "µm")
                factor = FILE_LENGTH_UNITS.get(unit)
                if factor is None:
                    return None
                sizes.append(float(value) * factor)
            return Calibration(tuple(sizes), "OME-XML PhysicalSize")
    return None


def _tiff_calibration(tif: Any, ndim_spatial: int) -> Calibration:
    page = tif.pages.first
    if tif.is_ome and tif.ome_metadata:
        ome = _ome_calibration(tif.ome_metadata)
        if ome is not None:
            sizes: tuple[float, ...] = ome.pixel_size_um or ()
            if len(sizes) == 3 and ndim_spatial == 2:
                sizes = sizes[1:]
            if len(sizes) == ndim_spatial:
                return Calibration(tuple(sizes), ome.source)
    tags = page.tags
    xres = tags.get("XResolution")
    yres = tags.get("YResolution")
    if xres is None or yres is None:
        return Calibration(None, "no resolution tags")
    try:
        rx = xres.value[0] / xres.value[1]
        ry = yres.value[0] / yres.value[1]
    except (TypeError, ZeroDivisionError, IndexError):
        return Calibration(None, "unreadable resolution tags")
    if not (rx > 0 and ry > 0 and math.isfinite(rx) and math.isfinite(ry)):
        return Calibration(None, "resolution tags are zero or invalid")
    unit_tag = tags.get("ResolutionUnit")
    unit_code = int(unit_tag.value) if unit_tag is not None else 2
    # the key=value text in the ImageDescription tag, as tifffile parses it
    described = tif.imagej_metadata or {}
    described_unit = str(described.get("unit", "")).replace("\\u00B5", "µ").strip()
    if LENGTH_UNITS.get(described_unit, ("px", None))[1] is not None:
        unit, source = described_unit, "ImageDescription unit and resolution tags"
    elif unit_code == 3:
        unit, source = "cm", "resolution tags (per centimetre)"
    elif unit_code == 2:
        if rx in _DEFAULT_DPI and ry in _DEFAULT_DPI:
            return Calibration(None, f"resolution {rx:g} dpi is a default, not a calibration")
        unit, source = "inch", "resolution tags (per inch)"
    else:
        return Calibration(None, "resolution tags without a unit")
    size_x = FILE_LENGTH_UNITS[unit] / rx
    size_y = FILE_LENGTH_UNITS[unit] / ry
    sizes = (size_y, size_x)
    if ndim_spatial == 3:
        spacing = described.get("spacing")
        if spacing is None:
            return Calibration(None, "volume without a z spacing")
        sizes = (float(spacing) * FILE_LENGTH_UNITS[unit],) + sizes
    return Calibration(sizes, source)


def _series_data(tif: Any, shown: str) -> np.ndarray:
    """The image data of a TIFF: its one series, or the volume its single-page series stack to.

    A multi-page TIFF without shape metadata (pages written one by one) comes
    back from tifffile as one series per page; reading only the first would
    silently turn a volume into its first slice. Pages of one 2-D shape and
    dtype are stacked as slices (z, y, x) in file order; series that differ
    are refused.
    """
    series = list(tif.series)
    if len(series) == 1:
        return np.asarray(series[0].asarray())
    shapes = {(tuple(s.shape), str(s.dtype)) for s in series}
    if len(shapes) != 1 or len(series[0].shape) != 2 or any(len(s.pages) != 1 for s in series):
        listed = ", ".join(f"{tuple(s.shape)} {s.dtype}" for s in series[:4])
        raise InputError(
            f"{shown}: {len(series)} image series of different shapes or types ({listed}"
            f"{', ...' if len(series) > 4 else ''}); lotproof reads one image or one volume "
            "per file"
        )
    return np.stack([np.asarray(s.asarray()) for s in series])


def _damaged(message: str, pages: int, size: int, shown: str) -> str:
    """The reason for a TIFF that tifffile warned about (a warning is a refusal, never a shrug).

    A cut multi-page file shows up as a page offset past the end of the file;
    tifffile then returns the pages before it with only a logger warning.
    """
    found = re.search(r"invalid page offset (\d+)", message)
    if found and int(found.group(1)) >= size:
        return (
            f"{shown}: truncated TIFF (page {pages + 1} is said to begin at byte "
            f"{found.group(1)}, the file has {size}; {pages} page(s) read)"
        )
    return f"{shown}: damaged TIFF ({message})"


def _check_page_count(tif: Any, pages: int, shown: str) -> None:
    """Refuse a file whose own description promises more pages than it holds."""
    declared = None
    shaped = tif.shaped_metadata or ()
    if tif.is_shaped and shaped and not shaped[0].get("truncated"):
        shape = shaped[0].get("shape")
        page_shape = tif.pages.first.shape
        if shape and math.prod(page_shape):
            declared = math.prod(int(n) for n in shape) // math.prod(page_shape)
    elif tif.is_imagej:
        images = (tif.imagej_metadata or {}).get("images")
        if isinstance(images, int):
            declared = images
    if declared is not None and declared > pages:
        raise InputError(
            f"{shown}: damaged multi-page TIFF (its description says {declared} pages, the "
            f"file holds {pages})"
        )


def _decode_tiff(raw: bytes, shown: str) -> tuple[np.ndarray, bool, Calibration]:
    import tifffile

    handler = _TiffWarnings()
    logger = logging.getLogger("tifffile")
    logger.addHandler(handler)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            with tifffile.TiffFile(io.BytesIO(raw)) as tif:
                pages = list(tif.pages)
                if handler.messages:
                    raise InputError(_damaged(handler.messages[0], len(pages), len(raw), shown))
                if not pages:
                    raise InputError(f"{shown}: TIFF without images")
                for n, page in enumerate(pages):
                    for offset, count in zip(page.dataoffsets, page.databytecounts, strict=False):
                        if offset + count > len(raw):
                            raise InputError(
                                f"{shown}: truncated TIFF (page {n + 1} needs bytes up to "
                                f"{offset + count}, the file has {len(raw)})"
                            )
                series = tif.series[0]
                # before any pixel is decoded: the shape comes from the header alone
                _check_pixels(
                    tuple(series.shape)
                    if len(tif.series) == 1
                    else (len(tif.series),) + tuple(series.shape),
                    series.dtype.itemsize,
                    shown,
                )
                _check_page_count(tif, len(pages), shown)
                for one in tif.series:
                    # a contiguous series is read in one piece from its first page's offset,
                    # past the strips that page declares: check the whole extent
                    start = one.dataoffset
                    if start is not None and start + one.nbytes > len(raw):
                        raise InputError(
                            f"{shown}: truncated TIFF (the image data need bytes up to "
                            f"{start + one.nbytes}, the file has {len(raw)})"
                        )
                page_total = sum(len(s.pages) for s in tif.series)
                if page_total < len(pages) and len(tif.series) == 1:
                    raise InputError(
                        f"{shown}: {len(pages)} pages but only {page_total} in the image series"
                    )
                data = _series_data(tif, shown)
                if handler.messages:
                    raise InputError(_damaged(handler.messages[0], len(pages), len(raw), shown))
                # a file's first page is always read in full (a TiffPage, never a TiffFrame)
                first = cast("tifffile.TiffPage", pages[0])
                photometric = getattr(first.photometric, "name", str(first.photometric))
                samples = first.samplesperpixel
                is_color = photometric in ("RGB", "YCBCR", "PALETTE") or samples in (3, 4)
                if photometric == "PALETTE":
                    data = first.asrgb()
                spatial = data.ndim - (1 if is_color else 0)
                calibration = _tiff_calibration(tif, spatial)
    except InputError:
        raise
    except Exception as err:  # tifffile raises many kinds on damaged files
        raise InputError(f"{shown}: cannot read as TIFF ({type(err).__name__}: {err})") from None
    finally:
        logger.removeHandler(handler)
    return data, is_color, calibration


def _decode_pillow(raw: bytes, shown: str, what: str) -> tuple[np.ndarray, bool, Calibration]:
    from PIL import Image, ImageFile

    ImageFile.LOAD_TRUNCATED_IMAGES = False
    Image.MAX_IMAGE_PIXELS = MAX_PIXELS
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            with Image.open(io.BytesIO(raw)) as opened:
                _check_pixels((opened.height, opened.width), 1, shown)
                opened.load()
                im: Image.Image = opened
                mode = im.mode
                dpi = im.info.get("dpi")
                if mode == "P":
                    im = im.convert("RGBA" if "transparency" in im.info else "RGB")
                    mode = im.mode
                if mode == "LA":
                    im = im.getchannel("L")
                    mode = "L"
                if mode == "1":
                    im = im.convert("L")
                    mode = "L"
                data = np.array(im)
    except InputError:
        raise
    except (Image.DecompressionBombWarning, Image.DecompressionBombError) as err:
        # raised by Image.open from the header alone, before any pixel is decoded
        claimed = re.search(r"\((\d+) pixels\)", str(err))
        raise InputError(
            f"{shown}: the header claims {claimed.group(1) if claimed else 'too many'} pixels, "
            f"more than the {MAX_PIXELS} pixels lotproof analyses in one image"
        ) from None
    except Exception as err:
        text = str(err)
        if "truncated" in text.lower() or "broken data stream" in text:
            raise InputError(f"{shown}: truncated {what} ({text})") from None
        raise InputError(f"{shown}: cannot read as {what} ({type(err).__name__}: {text})") from None
    is_color = mode in ("RGB", "RGBA", "CMYK", "YCbCr")
    calibration = Calibration(None, "no physical resolution")
    if dpi:
        try:
            dx, dy = float(dpi[0]), float(dpi[1])
        except (TypeError, ValueError, IndexError):
            dx = dy = 0.0
        if (
            dx > 0
            and dy > 0
            and not (round(dx, 3) in _DEFAULT_DPI and round(dy, 3) in _DEFAULT_DPI)
        ):
            calibration = Calibration((25400.0 / dy, 25400.0 / dx), f"{what} physical resolution")
    return data, is_color, calibration


_ALLOWED_DTYPES = (
    "uint8",
    "uint16",
    "uint32",
    "int8",
    "int16",
    "int32",
    "float32",
    "float64",
    "bool",
)


def read_image(path: Path, lot: Path, *, lossy: str = "refuse") -> LoadedImage:
    """Read one input file of ``lot``; raise :class:`InputError` with the reason if it cannot be used."""
    shown = path.relative_to(lot).as_posix() if path.is_relative_to(lot) else str(path)
    try:
        real = path.resolve(strict=True)
    except RuntimeError:
        raise InputError(f"{shown}: symbolic link loop") from None
    except OSError as err:
        if getattr(err, "errno", None) == 40:
            raise InputError(f"{shown}: symbolic link loop") from None
        raise InputError(f"{shown}: cannot open ({err.strerror or err})") from None
    if not real.is_relative_to(lot.resolve()):
        raise InputError(f"{shown}: points outside the lot folder ({real}); refused")
    raw = _read_bytes(path, shown)
    digest = hashlib.sha256(raw).hexdigest()
    suffix = path.suffix.lower()
    head = raw[:8]
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        kind = "tiff"
    elif head == b"\x89PNG\r\n\x1a\n":
        kind = "png"
    elif head[:3] == b"\xff\xd8\xff":
        kind = "jpeg"
    else:
        raise InputError(f"{shown}: not a TIFF, PNG or JPEG file (unknown content)")
    expected = {"tiff": TIFF_SUFFIXES, "png": PNG_SUFFIXES, "jpeg": JPEG_SUFFIXES}[kind]
    if suffix not in expected:
        raise InputError(
            f"{shown}: the content is {kind.upper()} but the name ends in {suffix or 'nothing'}; "
            "rename the file so its name says what it is"
        )
    if kind == "jpeg" and lossy != "allow":
        raise InputError(
            f"{shown}: JPEG is lossy and refused for measurement; the recipe may say "
            "lossy_input: allow"
        )
    if kind == "tiff":
        data, is_color, calibration = _decode_tiff(raw, shown)
    else:
        data, is_color, calibration = _decode_pillow(raw, shown, kind.upper())
    data = _check_data(data, is_color, shown)
    return LoadedImage(shown, len(raw), digest, data, is_color, calibration)


def _check_data(data: np.ndarray, is_color: bool, shown: str) -> np.ndarray:
    if data.dtype.byteorder not in ("=", "|"):
        data = data.astype(data.dtype.newbyteorder("="))
    if str(data.dtype) not in _ALLOWED_DTYPES:
        raise InputError(f"{shown}: pixel type {data.dtype} is not supported")
    if data.dtype == bool:
        data = data.astype(np.uint8)
    if is_color:
        if data.ndim != 3 or data.shape[-1] not in (3, 4):
            raise InputError(f"{shown}: colour image of shape {data.shape} is not supported")
        spatial = data.shape[:-1]
    else:
        data = np.squeeze(data) if data.ndim > 3 else data
        if data.ndim not in (2, 3):
            raise InputError(
                f"{shown}: {data.ndim}-D image data (shape {data.shape}) is not supported; "
                "lotproof reads 2-D images and 3-D volumes"
            )
        spatial = data.shape
    if min(spatial) < MIN_SIDE:
        raise InputError(
            f"{shown}: image of shape {data.shape} is smaller than {MIN_SIDE} pixels along an axis"
        )
    if data.dtype.kind == "f" and not np.isfinite(data).all():
        nan = int(np.count_nonzero(np.isnan(data)))
        inf = int(np.count_nonzero(np.isinf(data)))
        raise InputError(
            f"{shown}: {nan + inf} of {data.size} pixels are NaN or infinite ({nan} NaN, "
            f"{inf} infinite); lotproof measures finite values only"
        )
    _check_contrast(data, is_color, shown)
    return np.ascontiguousarray(data)


def _check_contrast(data: np.ndarray, is_color: bool, shown: str) -> None:
    """Refuse an image whose pixels are all the same: a blank frame, not a sample.

    A camera that failed, a closed shutter or a frame of zeros written by a
    crashed acquisition is constant. Measured, it has no objects: 0 porosity,
    0 inclusions, which passes every ``max`` limit. That must never count as a
    result, so a constant image is incomplete with the reason "no contrast".
    """
    pixels = data.reshape(-1, data.shape[-1]) if is_color else data.reshape(-1)
    low = pixels.min(axis=0)
    if np.array_equal(low, pixels.max(axis=0)):
        value = tuple(low.tolist()) if is_color else low.item()
        raise InputError(
            f"{shown}: no contrast (every pixel is {value}); a blank frame cannot be measured"
        )
