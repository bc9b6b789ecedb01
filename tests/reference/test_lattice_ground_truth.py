"""The lattice recipe on the lattice demo lot against the generator's ground truth.

source: demo_run/lattice/lot-truth.json, written by demo_run/lattice/generate.py from the void and
strut masks it drew (before blur and noise); the generator uses no lotproof step code.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from lotproof import load_recipe, run_lot

ROOT = Path(__file__).resolve().parents[2]
RECIPE = ROOT / "recipes" / "lattice-voids.yaml"
LOT = ROOT / "demo_run" / "lattice" / "LC-2612"
TRUTH = json.loads((ROOT / "demo_run" / "lattice" / "lot-truth.json").read_text())

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


def test_lot_files_are_the_generated_ones() -> None:
    for entry in TRUTH["images"]:
        # source: the generator's truth file pins each volume's sha256
        assert hashlib.sha256((LOT / entry["file"]).read_bytes()).hexdigest() == entry["sha256"]


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


def test_generator_is_deterministic(tmp_path: Path) -> None:
    import importlib.util

    spec = importlib.util.spec_from_file_location("lattice_generate", LOT.parent / "generate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    volume, truth = module.make_coupon("LC-2612-02", 2)
    committed = _truth("LC-2612-02.tif")
    # source: the committed truth of the same seed
    assert truth["void_voxels"] == committed["void_voxels"]
    assert truth["solid_voxels"] == committed["solid_voxels"]
    assert volume.shape == tuple(TRUTH["shape_zyx"]) and str(volume.dtype) == "uint8"
