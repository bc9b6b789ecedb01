"""The demo lot is exactly what demo_run/generate.py makes, and its truth is what it says."""

from __future__ import annotations

import hashlib
import importlib.util
import json
import math
import zlib
from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy import ndimage

DEMO = Path(__file__).resolve().parents[1] / "demo_run"
LOT_DIR = DEMO / "FD-2611"
TRUTH_PATH = DEMO / "lot-truth.json"

# Pinned on purpose: changing the generator or its output is a decision that
# updates these digests in the same commit as the new files.
PINNED_SHA256 = {
    "FD-2611-01.tif": "c494bb022ee6bc34a798d59a3afba0ecca42887aa4ca0beb8f3d02fb5ce21f0c",
    "FD-2611-02.tif": "899483f409a03ba995e4cf18c17d6feeeed61b289ece84e2b10b4fe633aaa84c",
    "FD-2611-03.tif": "08accd4f57a99be87cd3153f384e788d1779e54d3d620c3807c06f95bac9af5a",
    "FD-2611-04.tif": "21cc4d811b9b08cf4b27f6b64cc8ad7cde56e0774162e8fb55e6bf7f7daa724a",
    "FD-2611-05.tif": "0639a46e88e1e8babac76893f1d78135c1c4a92c43bf7f35c7aad53891309883",
    "FD-2611-06.tif": "be807b0405dad6bdde715950dcac3b280f64130ffeaa6fe496b2efcf28c50f34",
    "FD-2611-07.tif": "58d3813b277b36fd3af2b9ea5b6ced321120124285b7e4b0298eb8ba7d502eb8",
    "FD-2611-08.tif": "9d6af503bf4854cb08b0488a76cb05e910192215ebcc2fc6800ada7bea73b0c6",
    "lot-truth.json": "9699d912596c44560871785a329d9e46c8c409e960fbb68fb3f79a105f23e150",
}


def _load_generator():
    spec = importlib.util.spec_from_file_location("lotproof_demo_generate", DEMO / "generate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


gen = _load_generator()
NAMES = [gen.image_name(i) for i in range(1, gen.N_IMAGES + 1)]


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory) -> Path:
    """A fresh lot written by the command-line entry point."""
    lot = tmp_path_factory.mktemp("demo") / "lot"
    assert gen.main([str(lot)]) == 0
    return lot


@pytest.fixture(scope="module")
def committed_truth() -> dict:
    return json.loads(TRUTH_PATH.read_text(encoding="utf-8"))


def test_lot_folder_holds_exactly_the_eight_images():
    assert sorted(p.name for p in LOT_DIR.iterdir()) == NAMES
    assert NAMES[0] == "FD-2611-01.tif" and NAMES[-1] == "FD-2611-08.tif"


def test_committed_files_match_the_pinned_digests():
    for name in NAMES:
        assert _sha256(LOT_DIR / name) == PINNED_SHA256[name], name
    assert _sha256(TRUTH_PATH) == PINNED_SHA256["lot-truth.json"]


@pytest.mark.parametrize("name", NAMES)
def test_regenerated_image_is_byte_identical(regenerated, name):
    fresh, committed = regenerated / name, LOT_DIR / name
    if _sha256(fresh) != _sha256(committed):
        same_pixels = np.array_equal(tifffile.imread(fresh), tifffile.imread(committed))
        pytest.fail(
            f"{name}: sha256 differs from the committed file; pixels "
            + (
                "are equal, so the deflate stream differs (zlib " + zlib.ZLIB_RUNTIME_VERSION + ")"
                if same_pixels
                else "differ"
            )
        )


def test_regenerated_truth_file_is_byte_identical(regenerated):
    assert (regenerated.parent / gen.TRUTH_FILE).read_bytes() == TRUTH_PATH.read_bytes()


def test_generate_returns_the_committed_truth_and_repeats_itself(
    tmp_path, regenerated, committed_truth
):
    # A second run in the same process: no state carries over between runs.
    truth = gen.generate(tmp_path)
    assert truth == committed_truth
    assert gen.truth_json(truth) == TRUTH_PATH.read_text(encoding="utf-8")
    for name in NAMES:
        assert (tmp_path / name).read_bytes() == (regenerated / name).read_bytes(), name


def test_render_rejects_an_index_outside_the_lot():
    with pytest.raises(ValueError, match=r"1\.\.8"):
        gen.render(0)
    with pytest.raises(ValueError, match=r"1\.\.8"):
        gen.render(9)


def test_main_refuses_extra_arguments(capsys):
    assert gen.main(["a", "b"]) == 2
    assert gen.main(["--help"]) == 2
    assert "usage" in capsys.readouterr().err


@pytest.mark.parametrize("name", NAMES)
def test_image_dtype_shape_and_calibration_tags(name):
    with tifffile.TiffFile(LOT_DIR / name) as tif:
        assert len(tif.pages) == 1
        page = tif.pages[0]
        data = page.asarray()
        tags = page.tags
        # source: TIFF 6.0 specification, tags 282/283 (rational pixels per unit),
        # 296 (ResolutionUnit, 3 = centimetre), 259 (Compression, 8 = Adobe deflate),
        # 317 (Predictor, 2 = horizontal differencing)
        assert tags["XResolution"].value == (200000, 13)
        assert tags["YResolution"].value == (200000, 13)
        assert tags["ResolutionUnit"].value == 3
        assert tags["Compression"].value == 8
        assert tags["Predictor"].value == 2
        assert tags["BitsPerSample"].value == 16
        assert tags["SamplesPerPixel"].value == 1
        assert "DateTime" not in tags  # a clock in the file would break byte identity
        assert not tif.is_imagej and not tif.is_ome
    assert data.dtype == np.uint16
    assert data.shape == (1024, 1024)
    # source: closed form, 1e4 um per cm / (200000/13 px per cm) = 0.65 um per px
    assert math.isclose(1e4 * 13 / 200000, 0.65, rel_tol=0, abs_tol=1e-15)
    assert data.min() > 0 and data.max() <= 4095  # 12-bit range, nothing clipped at 0


def test_truth_lists_agree_with_counts_and_areas(committed_truth):
    assert committed_truth["pixel_size_um"] == 0.65
    assert committed_truth["shape"] == [1024, 1024]
    assert [im["file"] for im in committed_truth["images"]] == NAMES
    px_area = 0.65 * 0.65
    for im in committed_truth["images"]:
        n = im["pore_count"]
        assert len(im["pore_ecd_um"]) == n
        assert len(im["pore_ecd_drawn_um"]) == len(im["pore_touches_border"]) == n
        assert sum(im["pore_touches_border"]) == im["pore_count_touching_border"]
        assert im["pore_area_fraction"] == im["pore_pixels"] / (1024 * 1024)
        # source: closed form, ECD = sqrt(4 A / pi), so A = pi ECD^2 / 4; the ECDs are
        # rounded to 1e-4 um, which moves each area by far less than half a pixel
        areas_px = [round(math.pi * e * e / 4.0 / px_area) for e in im["pore_ecd_um"]]
        assert sum(areas_px) == im["pore_pixels"]
        lo, hi = committed_truth["parameters"]["pore_ecd_range_um"]
        assert all(lo <= e <= hi for e in im["pore_ecd_drawn_um"])
        assert 2 <= len(im["scratches"]) <= 4


def test_one_disc_is_above_the_porosity_limit(committed_truth):
    fractions = {im["file"]: im["pore_area_fraction"] for im in committed_truth["images"]}
    assert fractions.pop("FD-2611-06.tif") > 0.18 + 0.02
    assert all(0.10 < f < 0.16 for f in fractions.values())


@pytest.mark.parametrize("index", [1, 6])
def test_true_mask_pores_are_separate_regions(index, committed_truth):
    image, truth, mask, _ = gen._render(index)
    assert truth == committed_truth["images"][index - 1]
    assert np.array_equal(image, tifffile.imread(LOT_DIR / gen.image_name(index)))
    # source: scipy.ndimage.label with the full 3x3 structure (8-connectivity)
    labels, count = ndimage.label(mask, structure=np.ones((3, 3), dtype=bool))
    assert count == truth["pore_count"]
    sizes = np.bincount(labels.ravel())[1:]
    px_area = 0.65 * 0.65
    expected = sorted(round(math.pi * e * e / 4.0 / px_area) for e in truth["pore_ecd_um"])
    assert sorted(sizes.tolist()) == expected


def test_scratches_are_dark_lines_on_the_metal():
    image, truth, mask, cover = gen._render(1)
    on_scratch = (cover >= 0.5) & ~ndimage.binary_dilation(mask, iterations=6)
    metal = ~ndimage.binary_dilation(mask | (cover > 0), iterations=6)
    assert np.count_nonzero(cover >= 0.5) == truth["scratch_pixels"]
    # common practice, no source: a scratch at least 1.2 px wide, blurred by 0.8 px,
    # stays well below the metal around it
    assert np.median(image[on_scratch]) < 0.75 * np.median(image[metal])
