"""The powder recipe on the powder demo lot against the generator's ground truth.

source: demo_run/powder/lot-truth.json, written by demo_run/powder/generate.py from the
circles it drew (before the ring-light shading, blur and noise were added); the generator is
independent of the step code. The lot itself is pinned by sha256 and regenerated here.
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest
import tifffile

from lotproof import load_recipe, run_lot
from lotproof.runner.jobs.demo import SCENARIOS, demo_paths

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "demo_run" / "powder"
RECIPE = ROOT / "recipes" / "powder-size.yaml"
LOT = DEMO / "PW-2612"
TRUTH = json.loads((DEMO / "lot-truth.json").read_text())

# Pinned on purpose: changing the generator or its output is a decision that updates
# these digests in the same commit as the new files.
PINNED_SHA256 = {
    "PW-2612-01.tif": "609b8215a6210038a6c66fe48cff91ff18d048fc60cdcd1d959a3efcb525ff2d",
    "PW-2612-02.tif": "4688d7458e8fa892579fb1f1e2b9af30af60a43848d41a0e8ea44face6170b3c",
    "PW-2612-03.tif": "53e6bad65acdb7ed6f2ed4bd631110fe2afb428f69d4a18445eb873754be8b10",
    "PW-2612-04.tif": "3d0cdba32422869d64d92eb7734a4ee5e82fd0a5d6f5bc7bf9d52087722d2045",
    "PW-2612-05.tif": "62a9e7e62238b2f80574d3181895d4ec64f8503693faddaf92512b3b9c271532",
    "PW-2612-06.tif": "920e67c8f999bee904bafdcbc4e1f8126a26a0ad7925a8d3b04b6f775fdfea36",
    "lot-truth.json": "1031fef57a4cff1edf8965d709a6015aaf78814c06c9748597c9abba3e386ec7",
}

#: Measured particle count (whole particles, clusters cut by the frame left out) may differ
#: from the truth by this many particles. The generator keeps free particles 3 um apart and
#: draws every touching pair with a neck, so a method that works finds every one; 2 leaves
#: room for a pair whose neck the blur closes.
COUNT_TOLERANCE = 2
#: |measured D50 - true D50| in um. Blur and the threshold move every outline by a fraction
#: of a pixel (0.8 um), which shifts an ECD of ~30 um by about that much; the cut between
#: two touching particles gives one the lens the other loses.
D50_TOLERANCE_UM = 0.8
#: the same for D10 and D90, which rest on fewer particles on each side
TAIL_TOLERANCE_UM = 1.2


def _load_generator():
    spec = importlib.util.spec_from_file_location("lotproof_powder_generate", DEMO / "generate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


gen = _load_generator()


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _truth(image_id: str) -> dict:  # type: ignore[type-arg]
    (entry,) = [e for e in TRUTH["images"] if e["file"] == image_id]
    return entry


@pytest.fixture(scope="module")
def powder_run(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    return run_lot(load_recipe(RECIPE), LOT, tmp_path_factory.mktemp("runs"))


@pytest.fixture(scope="module")
def unsplit_run(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    """The same recipe with the touching particles left unsplit (label instead of split-touching)."""
    folder = tmp_path_factory.mktemp("variant")
    text = RECIPE.read_text()
    start = text.index("  separated:\n")
    end = text.index("  sizes:\n")
    text = (
        text[:start]
        + "  separated:\n    apply: label\n    to: whole\n    connectivity: 8\n"
        + text[end:]
    )
    start, end = text.index("  sieve:\n"), text.index("limits:\n")
    text = text[:start] + text[end:]
    path = folder / "unsplit.yaml"
    path.write_text(text)
    return run_lot(load_recipe(path), LOT, folder / "runs")


# --------------------------------------------------------------------------- the lot


def test_the_lot_is_what_the_generator_makes(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    assert gen.main([str(lot)]) == 0
    names = [gen.image_name(i) for i in range(1, gen.N_IMAGES + 1)]
    assert sorted(p.name for p in LOT.iterdir()) == names
    for name in names:
        fresh, committed = lot / name, LOT / name
        if _sha256(fresh) != _sha256(committed):
            # a zlib other than the one the lot was made with compresses differently
            np.testing.assert_array_equal(tifffile.imread(fresh), tifffile.imread(committed))
            pytest.fail(f"{name}: same pixels, other deflate bytes (another zlib build?)")
        assert _sha256(committed) == PINNED_SHA256[name], name
    assert (tmp_path / "lot-truth.json").read_bytes() == (DEMO / "lot-truth.json").read_bytes()
    assert _sha256(DEMO / "lot-truth.json") == PINNED_SHA256["lot-truth.json"]


def test_the_images_are_calibrated_8_bit_and_small() -> None:
    total = 0
    for path in sorted(LOT.iterdir()):
        total += path.stat().st_size
        with tifffile.TiffFile(path) as tif:
            page = tif.pages[0]
            assert page.dtype == np.uint8 and page.shape == gen.SHAPE
            # 12500 px/cm is exactly 0.8 um per pixel
            assert page.tags["XResolution"].value == (12500, 1)
            assert page.tags["YResolution"].value == (12500, 1)
            assert page.tags["ResolutionUnit"].value == 3  # centimetre
    assert total < 2_000_000


def test_the_truth_describes_one_fines_rich_sample() -> None:
    # the generator's own bookkeeping: drawn fines below 10 um are more than 10 % of the
    # whole particles only in the fines-rich sample, so a D10 >= 12 um limit must fail it alone
    for entry in TRUTH["images"]:
        share = entry["inside_fines_count"] / entry["inside_count"]
        rich = entry["file"] == gen.image_name(gen.FINES_RICH_IMAGE)
        assert entry["fines_rich"] is rich
        assert (share > 0.1) is rich, entry["file"]
        assert (entry["inside_ecd_um"]["d10"] < 12.0) is rich, entry["file"]
        assert entry["inside_touching_count"] >= 20  # plenty of touching particles to split


def test_the_demo_table_runs_this_recipe_on_this_lot() -> None:
    recipe, lot, out = demo_paths("powder")
    assert (recipe, lot) == (RECIPE, LOT)
    assert SCENARIOS["powder"].out == "demo_run/runs" and out == ROOT / "demo_run" / "runs"
    assert RECIPE.read_text().startswith(
        "# yaml-language-server: $schema=lotproof-recipe.schema.json\n"
    )


# --------------------------------------------------------------------------- the method


def test_split_touching_recovers_the_particle_count(powder_run) -> None:  # type: ignore[no-untyped-def]
    assert len(powder_run.results) == len(TRUTH["images"]) == gen.N_IMAGES
    for result in powder_run.results:
        truth = _truth(result.id)
        # source: ground truth of the generator: grains in clusters that do not touch the frame
        count = result.values[("sizes", "count")]
        assert abs(count - truth["inside_count"]) <= COUNT_TOLERANCE, result.id


def test_without_splitting_touching_particles_count_as_one(unsplit_run) -> None:  # type: ignore[no-untyped-def]
    for result in unsplit_run.results:
        truth = _truth(result.id)
        # source: ground truth: the number of 8-connected clusters of the drawn mask
        count = result.values[("sizes", "count")]
        assert abs(count - truth["inside_cluster_count"]) <= COUNT_TOLERANCE, result.id
        assert count < truth["inside_count"] - 10, result.id


def test_d50_and_the_tails_match_the_ground_truth(powder_run) -> None:  # type: ignore[no-untyped-def]
    for result in powder_run.results:
        truth = _truth(result.id)["inside_ecd_um"]
        # source: ground truth: number-weighted percentiles (numpy, linear) of the ECDs of the
        # drawn particles' own pixels; tolerances stated above
        assert result.values[("sizes", "ecd_d50")] == pytest.approx(
            truth["d50"], abs=D50_TOLERANCE_UM
        )
        assert result.values[("sizes", "ecd_d10")] == pytest.approx(
            truth["d10"], abs=TAIL_TOLERANCE_UM
        )
        assert result.values[("sizes", "ecd_d90")] == pytest.approx(
            truth["d90"], abs=TAIL_TOLERANCE_UM
        )


def test_only_the_fines_rich_sample_fails(powder_run) -> None:  # type: ignore[no-untyped-def]
    # source: the generator draws sample 04 with many fines (lot-truth.json: fines_rich)
    verdicts = powder_run.verdicts
    failing = sorted(i for i, (_, v) in verdicts.limits["fines"].per_image.items() if v == "fail")
    assert failing == [gen.image_name(gen.FINES_RICH_IMAGE)]
    assert all(v == "pass" for _, v in verdicts.limits["median-size"].per_image.values())
    assert verdicts.limits["lot-median-size"].verdict == "pass"
    assert verdicts.lot == "fail"


def test_the_size_spectrum_sees_the_particles_without_splitting(powder_run) -> None:  # type: ignore[no-untyped-def]
    for result in powder_run.results:
        truth = _truth(result.id)
        # source: ground truth: the particles' drawn radii. The spectrum's mean size is the
        # area-weighted mean radius, so it lies above the number-weighted median radius and
        # below the largest radius drawn
        mean_radius = result.values[("sieve", "mean_size")]
        assert 0.5 * truth["inside_diameter_um"]["d50"] < mean_radius < 30.0, result.id
        assert result.values[("sieve", "residual_fraction")] < 0.01, result.id
