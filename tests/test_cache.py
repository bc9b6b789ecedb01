"""The content-hash cache: keys, corruption, concurrency, partial recompute, --jobs."""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from lotproof import load_recipe, run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.evaluate.cache import DiskStore, NullStore, default_cache_dir
from lotproof.runner.evaluate.hashing import (
    content_checksum,
    hash_array,
    input_key,
    library_versions,
    step_key,
)
from lotproof.runner.recipe.load import parse_recipe
from lotproof.steps import REGISTRY, Output, Table, resolve_to_px

from _builders import noisy_discs, recipe_text, seeded_lot, write_recipe

#: background, Otsu threshold, opening, measure: four steps per image
RECIPE = recipe_text("cache-test", background="4 um", method="otsu", clean=True)


def _image(seed: int) -> np.ndarray:
    """96x96 uint16 noise with six bright discs at seeded places."""
    return noisy_discs(seed, side=96, count=6, centres=(10, 86), radii=(2, 5), add=800)


# ---------------------------------------------------------------- keys


def test_keys_stay_the_same() -> None:
    # Literal keys: a change of key format must be a decision (bump KEY_FORMAT), not an accident.
    kind = REGISTRY["open"]
    params = kind.params.model_validate({"footprint": "disk", "radius": "1.5 um"})
    params = params.model_copy(update={"radius": resolve_to_px(params.radius, 0.5)})
    key = step_key(
        "open", "1", params, (0.5, 0.5), ["a" * 64], {"numpy": "2.0.0", "scipy": "1.0.0"}
    )
    assert key == "eb9e2a96b2b240e44aeb61cf0b8ff8550ef4a78ef4c12484d4053e5d977b66ce"
    assert input_key("b" * 64, {"pixel_size_um": [0.5, 0.5], "source": "recipe"}) == (
        "8e5f41b38dd1a37354de5086b880edc4d42ab048de075e21cf15d4b4419b60d6"
    )
    assert input_key("b" * 64, {"pixel_size_um": [0.5, 0.5], "source": "recipe"}) == input_key(
        "b" * 64, {"source": "recipe", "pixel_size_um": [0.5, 0.5]}
    )
    assert (
        hash_array(np.zeros((2, 3), np.uint8))
        == hashlib.sha256(b'{"dtype":"|u1","shape":[2,3]}\x00' + bytes(6)).hexdigest()
    )


def _keys(text: str) -> dict[str, str]:
    recipe = parse_recipe(text.encode(), "r.yaml")
    keys = {"section": "f" * 64}
    for name in recipe.order:
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        from lotproof.runner.evaluate.image import resolve_params

        params = resolve_params(step.params, (0.5, 0.5))
        keys[name] = step_key(
            kind.name,
            kind.version,
            params,
            (0.5, 0.5),
            [keys[s] for s in step.to],
            library_versions(kind.libraries),
        )
    return keys


def test_key_ignores_names_order_and_formatting() -> None:
    base = _keys(RECIPE)
    renamed = RECIPE.replace("clean", "tidy")
    assert _keys(renamed)["tidy"] == base["clean"]
    reordered = RECIPE.replace(
        "    apply: open\n    to: spots\n    radius: 0.5 um\n",
        "    radius: 0.5 um   # a comment\n    to: spots\n    apply: open\n",
    )
    assert _keys(reordered) == base
    # the default written out gives the same key as the default left out
    explicit = RECIPE.replace("    radius: 0.5 um\n", "    radius: 0.5 um\n    footprint: disk\n")
    assert _keys(explicit) == base
    # the same length in other units: 0.5 um == 500 nm == 1 px at 0.5 um/px
    assert _keys(RECIPE.replace("radius: 0.5 um", "radius: 500 nm"))["clean"] == base["clean"]
    assert _keys(RECIPE.replace("radius: 0.5 um", "radius: 1 px"))["clean"] == base["clean"]


def test_key_changes_with_parameters_versions_and_libraries() -> None:
    base = _keys(RECIPE)
    changed = _keys(RECIPE.replace("radius: 0.5 um", "radius: 1 um"))
    assert changed["clean"] != base["clean"] and changed["stats"] != base["stats"]
    assert changed["level"] == base["level"] and changed["spots"] == base["spots"]
    kind = REGISTRY["open"]
    params = kind.params.model_validate({"radius": "1 px"})
    reference = step_key("open", "1", params, (0.5, 0.5), ["a" * 64], {"numpy": "2.0"})
    assert step_key("open", "2", params, (0.5, 0.5), ["a" * 64], {"numpy": "2.0"}) != reference
    assert step_key("open", "1", params, (0.5, 0.5), ["a" * 64], {"numpy": "2.1"}) != reference
    assert step_key("open", "1", params, (0.25, 0.25), ["a" * 64], {"numpy": "2.0"}) != reference
    assert step_key("open", "1", params, (0.5, 0.5), ["b" * 64], {"numpy": "2.0"}) != reference
    assert input_key("a" * 64, {"pixel_size_um": [0.5, 0.5]}) != input_key(
        "a" * 64, {"pixel_size_um": [0.25, 0.25]}
    )


# ---------------------------------------------------------------- the store


def _results() -> list[object]:
    table = Table(
        columns={"label": np.arange(1, 4, dtype=np.int32), "area": np.array([1.5, 2.0, np.nan])},
        units={"label": "-", "area": "um2"},
    )
    return [
        np.arange(12, dtype=np.uint16).reshape(3, 4),
        np.zeros((0, 5), np.float32),
        np.array([[True, False], [False, True]]),
        Output(
            data=np.ones((2, 2), np.float64),
            values={"level": 12.5, "nan": float("nan")},
            units={"level": "-", "nan": "-"},
        ),
        Output(data=table, values={"count": 3.0}, units={"count": "-"}),
    ]


@pytest.mark.parametrize("index", range(5))
def test_round_trip_is_exact(tmp_path: Path, index: int) -> None:
    store = DiskStore(tmp_path / "cache")
    result = _results()[index]
    key = hashlib.sha256(str(index).encode()).hexdigest()
    checksum = store.put(key, result)
    again, verified = store.get(key)
    assert content_checksum(again) == checksum == content_checksum(result) == verified
    assert store.checksum(key) == checksum
    assert store.path(key).parent.name == key[:2]


def _corruptions(path: Path) -> list[tuple[str, bytes]]:
    raw = path.read_bytes()
    header_end = raw.index(b"\n")
    return [
        ("flip payload byte", raw[:-3] + bytes([raw[-3] ^ 0x01]) + raw[-2:]),
        ("flip header byte", raw[:10] + bytes([raw[10] ^ 0x20]) + raw[11:]),
        ("truncate", raw[:-5]),
        ("drop the header", raw[header_end + 1 :]),
        ("empty", b""),
        ("extra bytes", raw + b"\x00"),
    ]


def test_corrupt_entries_are_misses_reported_once(tmp_path: Path) -> None:
    store = DiskStore(tmp_path / "cache")
    key = "ab" + "0" * 62
    result = np.arange(100, dtype=np.uint8).reshape(10, 10)
    store.put(key, result)
    path = store.path(key)
    for what, damaged in _corruptions(path):
        path.write_bytes(damaged)
        fresh = DiskStore(tmp_path / "cache")
        assert fresh.get(key) is None, what
        messages = fresh.drain_messages()
        assert len(messages) == 1 and str(path) in messages[0], what
        assert not path.exists(), what  # removed so the recomputed entry can take its place
        store.put(key, result)
    assert np.array_equal(store.get(key)[0], result)


def test_null_store_keeps_nothing() -> None:
    store = NullStore()
    assert store.put("a" * 64, np.zeros(3)) == content_checksum(np.zeros(3))
    assert store.get("a" * 64) is None


def test_default_cache_dir_follows_environment(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    monkeypatch.setenv("LOTPROOF_CACHE", str(tmp_path / "c"))
    assert default_cache_dir() == tmp_path / "c"
    monkeypatch.delenv("LOTPROOF_CACHE")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "x"))
    assert default_cache_dir() == tmp_path / "x" / "lotproof"


def _writer(root: str, seed: int, rounds: int) -> None:
    store = DiskStore(Path(root))
    for i in range(rounds):
        key = hashlib.sha256(str(i % 7).encode()).hexdigest()
        data = np.full((64, 64), i % 7, np.uint16)
        store.put(key, data)
        got = store.get(key)
        assert got is None or np.array_equal(got[0], data)


def test_concurrent_writers_do_not_corrupt(tmp_path: Path) -> None:
    root = tmp_path / "cache"
    context = multiprocessing.get_context("spawn")
    workers = [context.Process(target=_writer, args=(str(root), s, 60)) for s in range(3)]
    for w in workers:
        w.start()
    for w in workers:
        w.join(timeout=120)
        assert w.exitcode == 0
    store = DiskStore(root)
    for i in range(7):
        key = hashlib.sha256(str(i).encode()).hexdigest()
        assert np.array_equal(store.get(key)[0], np.full((64, 64), i, np.uint16))
    assert store.drain_messages() == []
    assert not list(root.glob("objects/*/.tmp-*"))


_KILLED_WRITER = """
import sys, numpy as np
from pathlib import Path
from lotproof.runner.evaluate.cache import DiskStore
store = DiskStore(Path(sys.argv[1]))
print("ready", flush=True)
i = 0
while True:
    store.put(("%064x" % (i % 5)), np.full((512, 512), i % 5, np.uint32))
    i += 1
"""


def test_a_killed_writer_leaves_no_entry_that_reads_as_valid(tmp_path: Path) -> None:
    root = tmp_path / "cache"
    proc = subprocess.Popen(
        [sys.executable, "-c", _KILLED_WRITER, str(root)], stdout=subprocess.PIPE
    )
    assert proc.stdout is not None and proc.stdout.readline().strip() == b"ready"
    time.sleep(0.5)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    proc.stdout.close()
    store = DiskStore(root)
    for i in range(5):
        got = store.get("%064x" % i)
        assert got is None or np.array_equal(got[0], np.full((512, 512), i, np.uint32))
    assert store.drain_messages() == []  # complete entries only: temporary files are never read
    store.prune(older_than_s=None, max_bytes=None, now=time.time() + 7200)
    assert not list(root.glob("objects/*/.tmp-*"))


def test_prune_by_size_and_age(tmp_path: Path) -> None:
    store = DiskStore(tmp_path / "cache")
    for i in range(5):
        store.put("%064x" % i, np.zeros(1000, np.uint8))
        os.utime(store.path("%064x" % i), (1000 + i, 1000 + i))
    one = store.path("%064x" % 0).stat().st_size
    removed, _ = store.prune(max_bytes=3 * one)
    assert removed == 2
    assert store.get("%064x" % 0) is None and store.get("%064x" % 4) is not None
    removed, _ = store.prune(older_than_s=60)
    assert removed == 2  # entries 2 and 3; entry 4 was used just now (read above)
    assert store.stats().entries == 1 and store.get("%064x" % 4) is not None


# ---------------------------------------------------------------- runs with a cache


def _rows(run: Path, name: str) -> list[str]:
    return (run / name).read_text().splitlines()


def test_partial_recompute_after_a_parameter_edit(tmp_path: Path) -> None:
    lot = seeded_lot(tmp_path, 4, _image)
    store = DiskStore(tmp_path / "cache")
    cold = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs", store=store)
    assert cold.step_counts() == {"computed": 16, "reused": 0}
    warm = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs", store=store)
    assert warm.step_counts() == {"computed": 0, "reused": 16}
    assert _rows(warm.run_dir, "images.csv") == _rows(cold.run_dir, "images.csv")
    assert _rows(warm.run_dir, "objects.csv") == _rows(cold.run_dir, "objects.csv")
    # the unchanged intermediates are not even loaded
    assert {s.cache for r in warm.results for s in r.steps if s.step == "level"} == {"skipped"}

    edited = write_recipe(tmp_path, RECIPE.replace("radius: 0.5 um", "radius: 1 um"), "edited.yaml")
    partial = run_lot(edited, lot, tmp_path / "runs", store=store)
    computed = {(r.id, s.step) for r in partial.results for s in r.steps if s.cache == "computed"}
    assert computed == {(f"img-{i:02d}.tif", step) for i in range(4) for step in ("clean", "stats")}

    tifffile.imwrite(lot / "img-09.tif", _image(9))
    added = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs", store=store)
    computed = {(r.id, s.step) for r in added.results for s in r.steps if s.cache == "computed"}
    assert {image for image, _ in computed} == {"img-09.tif"}

    steps_csv = _rows(added.run_dir, "steps.csv")
    assert steps_csv[0] == "image,step,kind,version,key,checksum,cache"
    assert len(steps_csv) == 1 + 5 * 4


def test_corrupt_entry_in_a_run_is_recomputed_and_reported(tmp_path: Path) -> None:
    lot = seeded_lot(tmp_path, 1, _image)
    store = DiskStore(tmp_path / "cache")
    cold = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs", store=store)
    key = next(s.key for s in cold.results[0].steps if s.step == "stats")
    path = store.path(key)
    raw = bytearray(path.read_bytes())
    raw[-1] ^= 0xFF
    path.write_bytes(bytes(raw))
    again = run_lot(
        write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs", store=DiskStore(tmp_path / "cache")
    )
    (result,) = again.results
    assert any("hash mismatch" in note for note in result.notes)
    assert {s.step: s.cache for s in result.steps}["stats"] == "computed"
    assert _rows(again.run_dir, "objects.csv") == _rows(cold.run_dir, "objects.csv")


_WHEN = re.compile(rb"\d{8}T\d{6}Z|\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z|local, \d+ process(es)?")


def _run_files(run: Path) -> dict[str, bytes]:
    # The ledger holds timings and the command line, and SHA256SUMS the hash of the report,
    # which names the run folder, its start time and how many processes ran it; with those
    # masked, every file is identical.
    return {
        p.relative_to(run).as_posix(): _WHEN.sub(b"<time>", p.read_bytes())
        for p in sorted(run.rglob("*"))
        if p.is_file()
        and p.name not in ("resolved.json", "ledger.jsonl", "ledger.sha256", "SHA256SUMS")
    }


def test_jobs_1_and_2_give_identical_files(tmp_path: Path) -> None:
    lot = seeded_lot(tmp_path, 5, _image)
    (lot / "img-03.tif").write_bytes(b"II*\x00broken")
    recipe = load_recipe(write_recipe(tmp_path, RECIPE))
    one = run_lot(recipe, lot, tmp_path / "runs1", store=DiskStore(tmp_path / "c1"), jobs=1)
    two = run_lot(recipe, lot, tmp_path / "runs2", store=DiskStore(tmp_path / "c2"), jobs=2)
    assert [r.id for r in one.results] == [r.id for r in two.results]
    assert _run_files(one.run_dir) == _run_files(two.run_dir)
    assert one.results[3].status == "incomplete" and two.results[4].status == "ok"


def test_cli_cache_options_and_command(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    lot = seeded_lot(tmp_path, 2, _image)
    recipe = write_recipe(tmp_path, RECIPE)
    cache = tmp_path / "cache"
    args = ["run", str(recipe), str(lot), "--out", str(tmp_path / "runs"), "--json", "-j", "1"]
    for expected in ({"computed": 8, "reused": 0}, {"computed": 0, "reused": 8}):
        with pytest.raises(SystemExit):
            main(args + ["--cache", str(cache)])
        assert json.loads(capsys.readouterr().out)["steps"] == expected
    with pytest.raises(SystemExit):
        main(args + ["--no-cache"])
    assert json.loads(capsys.readouterr().out)["steps"] == {"computed": 8, "reused": 0}
    monkeypatch.setenv("LOTPROOF_CACHE", str(cache))
    with pytest.raises(SystemExit):
        main(["cache", "--json"])
    shown = json.loads(capsys.readouterr().out)
    assert shown["location"] == str(cache) and shown["entries"] == 8 and shown["bytes"] > 0
    with pytest.raises(SystemExit) as exit_info:
        main(["cache", "prune", "--max-size", "0B"])
    assert exit_info.value.code == 0
    assert "removed 8 entries" in capsys.readouterr().out
