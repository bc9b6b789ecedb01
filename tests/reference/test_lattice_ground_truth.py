"""The lattice recipe on the lattice demo lot against the generator's ground truth.

source: demo_run/lattice/lot-truth.json, written by demo_run/lattice/generate.py from the void and
strut masks it drew (before blur and noise); the generator uses no lotproof step code.
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
import tifffile

from lotproof import load_recipe, run_lot
from lotproof.runner.evaluate.inputs import read_image

ROOT = Path(__file__).resolve().parents[2]
RECIPE = ROOT / "recipes" / "lattice-voids.yaml"
LOT = ROOT / "demo_run" / "lattice" / "LC-2612"
TRUTH_PATH = ROOT / "demo_run" / "lattice" / "lot-truth.json"
TRUTH = json.loads(TRUTH_PATH.read_text())

# Pinned on purpose: the truth file holds the sha256 of every volume, so this one digest pins
# the lot; changing the generator or its output is a decision that updates it in the same commit.
PINNED_TRUTH_SHA256 = "76188bbfbbefd64b2519f71d51b57d4e01c181987a2f018dc80b6cc4f0ab6e2c"

#: void content of the material within 10 % (relative) of the truth: blur and threshold move
#: each void's surface by a fraction of a voxel, about 5 % of the volume of a 10 um void
FRACTION_RELATIVE = 0.10
#: largest void ESD within 1 um (0.4 voxel) of the drawn voids' voxel ESD
ESD_TOLERANCE_UM = 1.0


@pytest.fixture(scope="module")
def lattice_run(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    return run_lot(load_recipe(RECIPE), LOT, tmp_path_factory.mktemp("runs"))


def _truth(image_id: str) -> dict:  # type: ignore[type-arg]
    (entry,) = [e for e in TRUTH["images"] if e["file"] == image_id]
    return entry


def _load_generator():  # type: ignore[no-untyped-def]
    spec = importlib.util.spec_from_file_location("lattice_generate", LOT.parent / "generate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_lot_files_are_the_generated_ones() -> None:
    assert hashlib.sha256(TRUTH_PATH.read_bytes()).hexdigest() == PINNED_TRUTH_SHA256
    assert sorted(p.name for p in LOT.iterdir()) == [e["file"] for e in TRUTH["images"]]
    for entry in TRUTH["images"]:
        # source: the generator's truth file pins each volume's sha256
        assert hashlib.sha256((LOT / entry["file"]).read_bytes()).hexdigest() == entry["sha256"]


def test_the_lot_is_what_the_generator_makes(tmp_path: Path) -> None:
    gen = _load_generator()
    assert gen.main([str(tmp_path / "lot")]) == 0
    for entry in TRUTH["images"]:
        fresh, committed = tmp_path / "lot" / entry["file"], LOT / entry["file"]
        if fresh.read_bytes() != committed.read_bytes():
            # a zlib other than the one the lot was made with compresses differently
            assert (tifffile.imread(fresh) == tifffile.imread(committed)).all(), entry["file"]
            pytest.fail(f"{entry['file']}: same voxels, other deflate bytes (another zlib build?)")
    assert (tmp_path / "lot-truth.json").read_bytes() == TRUTH_PATH.read_bytes()


def test_volumes_carry_their_voxel_size_as_ome_xml() -> None:
    ns = "{http://www.openmicroscopy.org/Schemas/OME/2016-06}"
    uuids = set()
    for entry in TRUTH["images"]:
        path = LOT / entry["file"]
        with tifffile.TiffFile(path) as tif:
            assert tif.is_ome and not tif.is_imagej and not tif.is_shaped
            assert len(tif.pages) == TRUTH["shape_zyx"][0]
            assert "DateTime" not in tif.pages.first.tags  # a clock would break byte identity
            root = ET.fromstring(tif.ome_metadata)
        # source: OME data model, schema 2016-06: Pixels/@PhysicalSizeX, Y, Z with their
        # *Unit attributes (UnitsLength, "µm"), Image/AcquisitionDate optional
        (pixels,) = root.iter(f"{ns}Pixels")
        dz, dy, dx = TRUTH["voxel_size_um_zyx"]
        assert [float(pixels.get(f"PhysicalSize{a}", "nan")) for a in "XYZ"] == [dx, dy, dz]
        assert {pixels.get(f"PhysicalSize{a}Unit") for a in "XYZ"} == {"µm"}
        assert (pixels.get("SizeX"), pixels.get("SizeY"), pixels.get("SizeZ")) == ("96",) * 3
        assert not list(root.iter(f"{ns}AcquisitionDate"))
        uuids.add(root.get("UUID"))
        calibration = read_image(path, LOT).calibration
        assert calibration.pixel_size_um == (dz, dy, dx)
        assert calibration.source == "OME-XML PhysicalSize"
    assert len(uuids) == len(TRUTH["images"])  # one UUID per file, none shared


def test_void_content_count_and_largest_void(lattice_run) -> None:  # type: ignore[no-untyped-def]
    assert len(lattice_run.results) == len(TRUTH["images"]) == 5
    for result in lattice_run.results:
        truth = _truth(result.id)
        assert result.status == "ok", result.reason
        assert result.spacing == tuple(TRUTH["voxel_size_um_zyx"])
        # source: generator truth, voids / (struts + voids) from the drawn masks
        fraction = result.values[("void-content", "fraction")]
        assert fraction == pytest.approx(truth["void_fraction_of_material"], rel=FRACTION_RELATIVE)
        # source: generator truth, the number of voids drawn (all inside the field)
        assert result.values[("void-stats", "count")] == truth["void_count"]
        # source: generator truth, ESD of the largest drawn void from its voxel count
        assert result.values[("void-stats", "esd_max")] == pytest.approx(
            truth["largest_void_esd_um"], abs=ESD_TOLERANCE_UM
        )


def test_the_porous_coupon_fails_and_the_rest_pass(lattice_run) -> None:  # type: ignore[no-untyped-def]
    # source: the generator draws coupon 04 with many more and larger voids
    for limit in ("void-content", "largest-void"):
        per_image = lattice_run.verdicts.limits[limit].per_image
        failing = sorted(image for image, (_, verdict) in per_image.items() if verdict == "fail")
        assert failing == ["LC-2612-04.tif"], limit
    assert lattice_run.verdicts.limits["lot-void-content"].verdict == "pass"
    assert lattice_run.verdicts.lot == "fail"


def test_generator_is_deterministic() -> None:
    volume, truth = _load_generator().make_coupon("LC-2612-02", 2)
    committed = _truth("LC-2612-02.tif")
    # source: the committed truth of the same seed
    assert truth["void_voxels"] == committed["void_voxels"]
    assert truth["solid_voxels"] == committed["solid_voxels"]
    assert volume.shape == tuple(TRUTH["shape_zyx"]) and str(volume.dtype) == "uint8"
