"""Write the bad input images of ``tests/bad_inputs/images/`` (deterministic, small).

Run ``python tests/bad_inputs/images/make_bad_images.py`` to rewrite them;
``tests/test_bad_images.py`` checks that the committed files are byte for byte
what this script writes. Each file is one way an image can be unusable; the
test puts it into a lot beside two good images and expects it to be refused
with the reason listed in ``EXPECTED`` (a part of the text in ``images.csv``).

Cases that cannot live in git (a file without read permission, symbolic link
loops, links that leave the lot) are made by the test at run time.
"""

from __future__ import annotations

import io
import struct
import sys
import zlib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image

__all__ = ["EXPECTED", "FILES", "write_all"]

HERE = Path(__file__).resolve().parent

#: side of the small test images, pixels
SIDE = 32


def _field(dtype: str = "uint8") -> np.ndarray:
    """A 32x32 field with a bright 8x8 square: what a good image of the test lot looks like."""
    image = np.full((SIDE, SIDE), 20, dtype)
    image[12:20, 12:20] = 200
    return image


def _tiff(data: np.ndarray, **kwargs: object) -> bytes:
    buffer = io.BytesIO()
    # fixed software and no datetime tag: the bytes do not depend on the tifffile version's defaults
    tifffile.imwrite(buffer, data, software=None, datetime=None, **kwargs)  # type: ignore[arg-type]
    return buffer.getvalue()


def _png(data: np.ndarray) -> bytes:
    """An 8-bit gray PNG written by hand, zlib level 0 (stored): no encoder version in the bytes."""
    height, width = data.shape
    rows = b"".join(b"\x00" + data[y].astype(np.uint8).tobytes() for y in range(height))
    return (
        b"\x89PNG\r\n\x1a\n"
        + _png_chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0))
        + _png_chunk(b"IDAT", zlib.compress(rows, 0))
        + _png_chunk(b"IEND", b"")
    )


def _png_chunk(kind: bytes, body: bytes) -> bytes:
    return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))


def zero_bytes() -> bytes:
    return b""


def truncated_strips() -> bytes:
    """A valid header and IFD, the pixel strips cut half-way."""
    raw = _tiff(_field(), rowsperstrip=4)
    with tifffile.TiffFile(io.BytesIO(raw)) as tif:
        page = tif.pages.first
        end = page.dataoffsets[-1] + page.databytecounts[-1]
    return raw[: end - SIDE * 8]


def truncated_stack() -> bytes:
    """A 5-page volume cut inside the third page's data: the header still says 5 pages."""
    volume = np.stack([_field()] * 5)
    raw = _tiff(volume)
    with tifffile.TiffFile(io.BytesIO(raw)) as tif:
        third = tif.pages[2]
        cut = third.dataoffsets[0] + third.databytecounts[0] // 2
    return raw[:cut]


def truncated_pages() -> bytes:
    """Five pages written one by one (each its own IFD), cut where the fourth page's IFD begins.

    tifffile reads the three pages before the cut with only a logger warning.
    """
    buffer = io.BytesIO()
    with tifffile.TiffWriter(buffer) as writer:
        for i in range(5):
            writer.write(_field() + i, software=None, datetime=None)
    raw = buffer.getvalue()
    with tifffile.TiffFile(io.BytesIO(raw)) as tif:
        cut = tif.pages[3].offset
    return raw[:cut]


def short_stack() -> bytes:
    """A 5-page volume whose first IFD says "no next page": the description still says 5 pages."""
    raw = bytearray(_tiff(np.stack([_field() + i for i in range(5)])))
    with tifffile.TiffFile(io.BytesIO(bytes(raw))) as tif:
        first = tif.pages.first.offset
    (entries,) = struct.unpack_from("<H", raw, first)
    struct.pack_into("<I", raw, first + 2 + 12 * entries, 0)
    return bytes(raw)


def truncated_png() -> bytes:
    raw = _png(_field())
    return raw[: len(raw) // 2]


def png_named_tif() -> bytes:
    return _png(_field())


def tif_named_png() -> bytes:
    return _tiff(_field())


def one_pixel() -> bytes:
    return _tiff(np.array([[128]], np.uint8))


def all_nan() -> bytes:
    return _tiff(np.full((SIDE, SIDE), np.nan, np.float32))


def one_inf() -> bytes:
    image = _field("float32")
    image[3, 5] = np.inf
    return _tiff(image)


def constant() -> bytes:
    return _tiff(np.full((SIDE, SIDE), 20, np.uint8))


def four_d() -> bytes:
    data = np.stack([np.stack([_field()[:8, :8] + z for z in range(5)])] * 2)  # (2, 5, 8, 8)
    return _tiff(data, photometric="minisblack", metadata={"axes": "TZYX"})


def five_d() -> bytes:
    data = np.zeros((2, 2, 2, 8, 8), np.uint8)
    data[..., 2:6, 2:6] = 200
    return _tiff(data, photometric="minisblack", metadata={"axes": "TCZYX"})


def huge_tiff() -> bytes:
    """A TIFF whose one IFD claims 100000 x 100000 uint16 pixels in a 16-byte strip."""
    width = height = 100_000
    entries = [  # (tag, type, count, value); types: 3 SHORT, 4 LONG
        (256, 4, 1, width),  # ImageWidth
        (257, 4, 1, height),  # ImageLength
        (258, 3, 1, 16),  # BitsPerSample
        (259, 3, 1, 1),  # Compression: none
        (262, 3, 1, 1),  # Photometric: black is zero
        (273, 4, 1, 0),  # StripOffsets, filled in below
        (277, 3, 1, 1),  # SamplesPerPixel
        (278, 4, 1, height),  # RowsPerStrip
        (279, 4, 1, 16),  # StripByteCounts: a tiny strip
        (339, 3, 1, 1),  # SampleFormat: unsigned integer
    ]
    ifd_offset = 8
    ifd_size = 2 + 12 * len(entries) + 4
    strip_offset = ifd_offset + ifd_size
    out = bytearray(b"II*\x00" + struct.pack("<I", ifd_offset))
    out += struct.pack("<H", len(entries))
    for tag, kind, count, value in entries:
        if tag == 273:
            value = strip_offset
        packed = struct.pack("<H", value) + b"\x00\x00" if kind == 3 else struct.pack("<I", value)
        out += struct.pack("<HHI", tag, kind, count) + packed
    out += struct.pack("<I", 0)  # no next IFD
    out += bytes(16)
    return bytes(out)


def huge_png() -> bytes:
    """A PNG whose header claims 100000 x 100000 8-bit gray pixels, with one tiny data chunk."""
    header = struct.pack(">IIBBBBB", 100_000, 100_000, 8, 0, 0, 0, 0)
    body = zlib.compress(bytes(1001), 0)  # the first row only
    return (
        b"\x89PNG\r\n\x1a\n"
        + _png_chunk(b"IHDR", header)
        + _png_chunk(b"IDAT", body)
        + _png_chunk(b"IEND", b"")
    )


def rgb() -> bytes:
    field = _field()
    return _tiff(np.stack([field, field // 2, field], axis=-1), photometric="rgb")


def jpeg() -> bytes:
    buffer = io.BytesIO()
    Image.fromarray(_field()).save(buffer, format="JPEG", quality=90)
    return buffer.getvalue()


def garbage() -> bytes:
    rng = np.random.default_rng(9)
    return b"GARBAGE!" + rng.integers(0, 256, 2000, dtype=np.uint8).tobytes()


def float16() -> bytes:
    return _tiff(_field("float16"))


def complex64() -> bytes:
    return _tiff(_field("complex64"))


#: file name -> the function that writes its bytes
FILES: dict[str, Callable[[], bytes]] = {
    "zero-bytes.tif": zero_bytes,
    "truncated-strips.tif": truncated_strips,
    "truncated-stack.tif": truncated_stack,
    "truncated-pages.tif": truncated_pages,
    "short-stack.tif": short_stack,
    "truncated.png": truncated_png,
    "png-named.tif": png_named_tif,
    "tiff-named.png": tif_named_png,
    "one-pixel.tif": one_pixel,
    "all-nan.tif": all_nan,
    "one-inf.tif": one_inf,
    "constant.tif": constant,
    "four-d.tif": four_d,
    "five-d.tif": five_d,
    "huge-header.tif": huge_tiff,
    "huge-header.png": huge_png,
    "rgb.tif": rgb,
    "photo.jpg": jpeg,
    "garbage.tif": garbage,
    "float16.tif": float16,
    "complex64.tif": complex64,
}

#: file name -> text the reason in images.csv must contain (the file's name comes first)
EXPECTED: dict[str, str] = {
    "zero-bytes.tif": "the file is empty (0 bytes)",
    "truncated-strips.tif": "truncated TIFF (page 1 needs bytes up to",
    "truncated-stack.tif": "truncated TIFF (page 2 is said to begin at byte",
    "truncated-pages.tif": "truncated TIFF (page 4 is said to begin at byte 3808",
    "short-stack.tif": "its description says 5 pages, the file holds 1",
    "truncated.png": "truncated PNG",
    "png-named.tif": "the content is PNG but the name ends in .tif",
    "tiff-named.png": "the content is TIFF but the name ends in .png",
    "one-pixel.tif": "smaller than 4 pixels along an axis",
    "all-nan.tif": "1024 of 1024 pixels are NaN or infinite (1024 NaN, 0 infinite)",
    "one-inf.tif": "1 of 1024 pixels are NaN or infinite (0 NaN, 1 infinite)",
    "constant.tif": "no contrast",
    "four-d.tif": "4-D image data",
    "five-d.tif": "5-D image data",
    "huge-header.tif": "10000000000 pixels (shape (100000, 100000)) is more than the 536870912 pixels",
    "huge-header.png": "the header claims 10000000000 pixels, more than the 536870912 pixels",
    "rgb.tif": "apply: gray",
    "photo.jpg": "JPEG is lossy",
    "garbage.tif": "not a TIFF, PNG or JPEG file",
    "float16.tif": "pixel type float16 is not supported",
    "complex64.tif": "pixel type complex64 is not supported",
}


def write_all(folder: Path = HERE) -> dict[str, bytes]:
    """Write every file into ``folder``; return name -> bytes."""
    written = {}
    for name, make in FILES.items():
        data = make()
        (folder / name).write_bytes(data)
        written[name] = data
    return written


if __name__ == "__main__":
    for name, data in write_all(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE).items():
        print(f"{len(data):8d}  {name}")
