"""The dask executor: a real LocalCluster gives the local executor's files; dead workers.

One cluster of 2 worker processes on loopback serves the whole module. Worker
deaths are injected with a test-only step kind, ``fault-probe``, registered in
the workers by a worker plugin (also in workers the nanny restarts): on the image
whose first pixel is the trigger value, while a marker file exists, it ends its
process with ``os._exit`` in the middle of the image, after the first step's
result (its second input) went into the cache.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from collections import defaultdict
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pytest
from pydantic import Field

distributed = pytest.importorskip("distributed")

from lotproof import load_recipe, run_lot  # noqa: E402
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_OK  # noqa: E402
from lotproof.runner.evaluate.cache import DiskStore  # noqa: E402
from lotproof.runner.lot.base import ExecutorError  # noqa: E402
from lotproof.runner.lot.choose import EXECUTOR_KINDS, make_executor, open_executor  # noqa: E402
from lotproof.runner.lot.local import LocalExecutor  # noqa: E402
from lotproof.steps import REGISTRY, StepParams, step  # noqa: E402

from _builders import noisy_discs, seeded_lot, write_recipe  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEMO_RECIPE = ROOT / "recipes" / "filter-disc-porosity.yaml"
DEMO_LOT = ROOT / "demo_run" / "FD-2611"

PROBE = "fault-probe"
PROBE_MODES = ("once", "always")
#: first pixel of the image the probe acts on (the others start far from it)
TRIGGER = 4321
#: the exit status of a worker the probe ended
PROBE_EXIT = 70


class FaultProbeParams(StepParams):
    marker: str = Field(description="path of the marker file; nothing happens without it")
    trigger: int = Field(TRIGGER, description="first-pixel value of the image to act on")
    mode: Literal[PROBE_MODES] = Field(
        "once", description="once: the first worker to claim the marker ends; always: every one"
    )


def fault_probe(
    params: FaultProbeParams, image: np.ndarray, level: np.ndarray, *, spacing: tuple[float, ...]
) -> np.ndarray:
    """Test only: end this process on the trigger image while the marker file exists; else pass ``level`` on."""
    if int(image.flat[0]) == params.trigger:
        marker = Path(params.marker)
        if params.mode == "once":
            try:  # a rename is atomic: exactly one worker claims the marker
                marker.rename(marker.with_name(marker.name + ".taken"))
            except FileNotFoundError:
                return level.copy()
            os._exit(PROBE_EXIT)
        if marker.exists():
            os._exit(PROBE_EXIT)
    return level.copy()


def register_probe() -> None:
    if PROBE not in REGISTRY:
        step(
            PROBE,
            params=FaultProbeParams,
            takes=["image", "image"],
            gives="image",
            version="1",
            ndims=(2,),
            libraries=("numpy",),
        )(fault_probe)


class ProbePlugin(distributed.WorkerPlugin):
    name = "lotproof-fault-probe"

    def setup(self, worker: Any) -> None:
        register_probe()


# kept here, not built by _builders.recipe_text: no measure step, a limit on the threshold
# level, and PROBE_RECIPE below edits this text
SYNTH_RECIPE = """\
format: lotproof/1
name: dask-test
revision: 1
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background
    to: section
    features: bright
    radius: 3 um
  spots:
    apply: threshold
    to: level
    method: otsu
    keep: true
limits:
  level:
    value: spots.level
    max: 2000
"""

PROBE_RECIPE = SYNTH_RECIPE.replace(
    "    to: level\n    method: otsu",
    "    to: probed\n    method: otsu",
).replace(
    "  spots:\n",
    "  probed:\n    apply: fault-probe\n    to: [section, level]\n    marker: {marker}\n    mode: {mode}\n  spots:\n",
)


def _image(seed: int, trigger: bool = False) -> np.ndarray:
    """64x64 uint16 noise with four bright discs; the first pixel marks the probe's image."""
    image = noisy_discs(seed, side=64, count=4, centres=(8, 56), radii=(2, 4), add=600)
    image[0, 0] = TRIGGER if trigger else 900
    return image


def _lot(tmp_path: Path, n: int, *, trigger: int | None = None, broken: int | None = None) -> Path:
    lot = seeded_lot(tmp_path, n, lambda i: _image(i, trigger=i == trigger))
    if broken is not None:
        (lot / f"img-{broken:02d}.tif").write_bytes(b"II*\x00broken")
    return lot


#: report fields that say when, by which executor and at which commit a run was made
_REPORT_VOLATILE = (
    (re.compile(rb"<dt>(Date \(UTC\)|Executor)</dt><dd>.*?</dd>"), rb"<dt>\1</dt><dd></dd>"),
    (re.compile(rb"commit <code>[0-9a-f]{40}</code>"), rb"commit <code></code>"),
)


def _run_files(run: Path, *, cache_column: bool = True) -> dict[str, bytes]:
    """Every file of a run folder but the ledger (compared by :func:`_ledger`).

    The report loses its date, executor, commit and run-folder name and SHA256SUMS
    its report line; ``cache_column=False`` also drops steps.csv's computed/reused
    column and SHA256SUMS's steps.csv line.
    """
    out = {}
    for p in sorted(run.rglob("*")):
        if not p.is_file() or p.name in ("ledger.jsonl", "ledger.sha256"):
            continue
        name = p.relative_to(run).as_posix()
        data = p.read_bytes()
        if name == "report.html":
            data = data.replace(run.name.encode(), b"RUN")
            for pattern, replacement in _REPORT_VOLATILE:
                data = pattern.sub(replacement, data)
        if name == "SHA256SUMS":
            skip = (b"  report.html",) + (() if cache_column else (b"  steps.csv",))
            data = b"\n".join(line for line in data.splitlines() if not line.endswith(skip))
        if not cache_column and name == "steps.csv":
            data = b"\n".join(line.rsplit(b",", 1)[0] for line in data.splitlines())
        out[name] = data
    return out


#: ledger fields that differ between executors by nature
_VOLATILE = {"seq", "prev", "seconds", "worker", "time_utc"}
#: run files whose checksums cover the date, executor or cache column
_OUTPUTS_VOLATILE = {"report.html", "SHA256SUMS", "steps.csv"}


def _ledger(run: Path) -> tuple[list[dict[str, Any]], dict[str, list[dict[str, Any]]]]:
    """The ledger without timings and workers: run-wide events in order, per-image events by image."""
    lot_events: list[dict[str, Any]] = []
    by_image: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for line in (run / "ledger.jsonl").read_text().splitlines():
        event = json.loads(line)
        if event["type"] in ("run-start", "run-end"):
            continue  # the machine, the command line, the executor, the clock
        event = {k: v for k, v in event.items() if k not in _VOLATILE}
        if event["type"] == "recipe" and event.get("git"):
            event["git"] = {**event["git"], "commit": None}  # others commit while tests run
        if event["type"] == "output" and event["path"] in _OUTPUTS_VOLATILE:
            event = {"type": "output", "path": event["path"]}  # compared by _run_files
        if "image" in event:
            by_image[event["image"]].append(event)
        else:
            lot_events.append(event)
    return lot_events, dict(by_image)


def _image_events(run: Path) -> dict[str, dict[str, Any]]:
    out = {}
    for line in (run / "ledger.jsonl").read_text().splitlines():
        event = json.loads(line)
        if event["type"] == "image":
            out[event["image"]] = event
    return out


@pytest.fixture(scope="module")
def executor() -> Any:
    register_probe()
    try:
        with open_executor("dask-local", jobs=2, scheduler=None, workers=2) as dask_executor:
            dask_executor.client.register_plugin(ProbePlugin())
            yield dask_executor
    finally:
        REGISTRY.pop(PROBE, None)


def _workers(executor: Any) -> set[str]:
    return set(executor.client.scheduler_info(n_workers=-1)["workers"])


# ------------------------------------------------------------------ identity


def test_demo_lot_gives_the_local_executors_files(tmp_path: Path, executor: Any) -> None:
    recipe = load_recipe(DEMO_RECIPE)
    local = run_lot(recipe, DEMO_LOT, tmp_path / "local", store=DiskStore(tmp_path / "c1"), jobs=1)
    dask = run_lot(
        recipe, DEMO_LOT, tmp_path / "dask", store=DiskStore(tmp_path / "c2"), executor=executor
    )
    # source: the local executor (lotproof.runner.lot.local.LocalExecutor, jobs=1), the reference run
    assert [r.id for r in dask.results] == [r.id for r in local.results]
    assert [(r.status, r.reason) for r in dask.results] == [
        (r.status, r.reason) for r in local.results
    ]
    assert all(r.status == "ok" for r in dask.results)
    assert _run_files(dask.run_dir) == _run_files(local.run_dir)
    assert _ledger(dask.run_dir) == _ledger(local.run_dir)
    assert dask.verdicts.lot == local.verdicts.lot and dask.exit_code == local.exit_code
    # the ledger says where each image ran: on the cluster's worker processes
    start = json.loads((dask.run_dir / "ledger.jsonl").read_text().splitlines()[0])
    assert start["executor"].startswith("dask-local, 2 worker processes")
    workers = {event["worker"] for event in _image_events(dask.run_dir).values()}
    assert workers and all(w.split(":")[1] != str(os.getpid()) for w in workers)


def test_synthetic_lot_with_a_broken_image_cold_then_warm(
    tmp_path: Path, executor: Any, monkeypatch: pytest.MonkeyPatch
) -> None:
    lot = _lot(tmp_path, 6, broken=4)
    recipe = load_recipe(write_recipe(tmp_path, SYNTH_RECIPE))
    # workers do not share our working folder: relative lot and cache paths must still work
    monkeypatch.chdir(tmp_path)
    assert lot == tmp_path / "lot"
    local = run_lot(
        recipe, Path("lot"), Path("local"), store=DiskStore(Path("c1")), executor=LocalExecutor(1)
    )
    cold = run_lot(
        recipe, Path("lot"), Path("dask"), store=DiskStore(Path("c2")), executor=executor
    )
    warm = run_lot(
        recipe, Path("lot"), Path("dask"), store=DiskStore(Path("c2")), executor=executor
    )
    # source: the local executor (lotproof.runner.lot.local.LocalExecutor, jobs=1), the reference run
    assert _run_files(cold.run_dir) == _run_files(local.run_dir)
    assert _run_files(warm.run_dir, cache_column=False) == _run_files(
        cold.run_dir, cache_column=False
    )
    assert _ledger(cold.run_dir) == _ledger(local.run_dir)
    assert cold.results[4].status == "incomplete" and "not a TIFF" not in cold.results[0].reason
    assert cold.results[4].reason == local.results[4].reason
    assert cold.exit_code == local.exit_code == EXIT_BAD_INPUT
    # the warm run read every step from the cache folder the workers wrote
    assert cold.step_counts() == {"computed": 10, "reused": 0}
    assert warm.step_counts() == {"computed": 0, "reused": 10}


def test_results_come_back_in_the_samples_order_and_on_image_sees_each_once(
    tmp_path: Path, executor: Any
) -> None:
    lot = _lot(tmp_path, 5)
    recipe = load_recipe(write_recipe(tmp_path, SYNTH_RECIPE))
    seen: list[str] = []
    summary = run_lot(
        recipe,
        lot,
        tmp_path / "runs",
        executor=executor,
        on_image=lambda r: seen.append(r.id),
    )
    ids = [f"img-{i:02d}.tif" for i in range(5)]
    assert [r.id for r in summary.results] == ids
    assert sorted(seen) == ids
    assert summary.exit_code == EXIT_OK


def test_an_existing_scheduler_by_address_and_by_dask_config(tmp_path: Path, executor: Any) -> None:
    import dask

    lot = _lot(tmp_path, 3)
    recipe = load_recipe(write_recipe(tmp_path, SYNTH_RECIPE))
    address = executor.client.scheduler.address
    local = run_lot(recipe, lot, tmp_path / "local", jobs=1)
    with open_executor("dask", jobs=1, scheduler=address, workers=None) as by_address:
        assert by_address.description.startswith(f"dask, scheduler {address}, 2 workers at start")
        remote = run_lot(recipe, lot, tmp_path / "remote", executor=by_address)
    # source: the local executor (lotproof.runner.lot.local.LocalExecutor, jobs=1), the reference run
    assert _run_files(remote.run_dir) == _run_files(local.run_dir)
    # $DASK_SCHEDULER_ADDRESS is read into dask's config as scheduler-address
    with dask.config.set({"scheduler-address": address}):
        with open_executor("dask", jobs=1, scheduler=None, workers=None) as by_config:
            assert by_config.description.startswith(f"dask, scheduler {address}")
    # closing a client of an existing scheduler leaves the scheduler and its workers running
    assert len(_workers(executor)) == 2


# ------------------------------------------------------------------ dead workers


def _probe_recipe(tmp_path: Path, marker: Path, mode: str) -> Any:
    text = PROBE_RECIPE.format(marker=json.dumps(str(marker)), mode=mode)
    return load_recipe(write_recipe(tmp_path, text, f"probe-{mode}.yaml"))


def test_a_worker_dying_mid_image_is_retried_once_and_the_lot_completes(
    tmp_path: Path, executor: Any
) -> None:
    lot = _lot(tmp_path, 6, trigger=2)
    marker = tmp_path / "die-once"
    recipe = _probe_recipe(tmp_path, marker, "once")
    # the reference run first, without the marker: the probe is then the identity
    local = run_lot(recipe, lot, tmp_path / "local", store=DiskStore(tmp_path / "c1"), jobs=1)
    assert local.exit_code == EXIT_OK
    before = _workers(executor)
    marker.touch()
    dask = run_lot(
        recipe, lot, tmp_path / "dask", store=DiskStore(tmp_path / "c2"), executor=executor
    )
    # the probe did end a worker: it claimed the marker
    assert not marker.exists() and (tmp_path / "die-once.taken").exists()
    assert _workers(executor) != before or len(before) < 2
    assert [r.status for r in dask.results] == ["ok"] * 6 and dask.exit_code == EXIT_OK
    # source: the local executor (lotproof.runner.lot.local.LocalExecutor, jobs=1), the reference run
    # (the retried image read its first step from the cache: steps.csv says "reused")
    assert _run_files(dask.run_dir, cache_column=False) == _run_files(
        local.run_dir, cache_column=False
    )
    retried = dask.results[2]
    # nothing already computed was lost: the retry read the first step from the cache
    assert [(s.step, s.cache) for s in retried.steps] == [
        ("level", "reused"),
        ("probed", "computed"),
        ("spots", "computed"),
    ]
    assert any("stopped; analysed again" in note for note in retried.notes)
    assert all(not r.notes for i, r in enumerate(dask.results) if i != 2)


def test_an_image_that_kills_every_worker_is_incomplete_with_the_reason(
    tmp_path: Path, executor: Any
) -> None:
    lot = _lot(tmp_path, 5, trigger=1)
    marker = tmp_path / "die-always"
    marker.touch()
    recipe = _probe_recipe(tmp_path, marker, "always")
    summary = run_lot(
        recipe, lot, tmp_path / "dask", store=DiskStore(tmp_path / "c"), executor=executor
    )
    statuses = {r.id: r.status for r in summary.results}
    # precisely incomplete: the image that killed its workers, and only it
    assert statuses == {f"img-{i:02d}.tif": ("incomplete" if i == 1 else "ok") for i in range(5)}
    reason = summary.results[1].reason
    assert "every worker that analysed it stopped" in reason and "2 tries" in reason
    assert summary.exit_code == EXIT_BAD_INPUT and summary.verdicts.lot == "incomplete"
    events = _image_events(summary.run_dir)
    assert (
        events["img-01.tif"]["status"] == "incomplete" and events["img-01.tif"]["reason"] == reason
    )
    verdicts = json.loads((summary.run_dir / "verdicts.json").read_text())
    assert verdicts["incomplete_images"] == {"img-01.tif": reason}
    # the first step of the image that killed its workers was kept in the cache
    marker.unlink()
    again = run_lot(
        recipe, lot, tmp_path / "dask", store=DiskStore(tmp_path / "c"), executor=executor
    )
    assert again.exit_code == EXIT_OK
    assert next((s.step, s.cache) for s in again.results[1].steps) == ("level", "reused")


# ------------------------------------------------------------------ choosing an executor


def test_make_executor_refuses_options_that_do_not_go_together() -> None:
    assert EXECUTOR_KINDS == ("local", "dask", "dask-local")
    local = make_executor("local", jobs=3, scheduler=None, workers=None)
    assert isinstance(local, LocalExecutor) and local.jobs == 3
    with pytest.raises(ExecutorError, match="unknown executor 'ray'"):
        make_executor("ray", jobs=1, scheduler=None, workers=None)
    with pytest.raises(ExecutorError, match="--scheduler goes with --executor dask"):
        make_executor("dask-local", jobs=1, scheduler="tcp://127.0.0.1:8786", workers=None)
    with pytest.raises(ExecutorError, match="--workers goes with --executor dask-local"):
        make_executor("local", jobs=1, scheduler=None, workers=2)
    with pytest.raises(ExecutorError, match="--workers goes with --executor dask-local"):
        make_executor("dask", jobs=1, scheduler="tcp://127.0.0.1:8786", workers=2)


def test_dask_without_a_scheduler_address_says_how_to_give_one(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    import dask

    monkeypatch.delenv("DASK_SCHEDULER_ADDRESS", raising=False)
    with dask.config.set({"scheduler-address": None}):
        with pytest.raises(ExecutorError, match="--scheduler tcp://HOST:PORT"):
            make_executor("dask", jobs=1, scheduler=None, workers=None)


def test_an_unreachable_scheduler_is_an_executor_error() -> None:
    from lotproof.runner.lot.cluster import DaskExecutor

    # nothing listens on port 1 of loopback; the client keeps trying until its timeout
    with pytest.raises(
        ExecutorError, match=r"cannot reach the dask scheduler at tcp://127\.0\.0\.1:1"
    ):
        DaskExecutor(scheduler="tcp://127.0.0.1:1", connect_timeout=0.5)


def test_a_worker_with_other_software_analyses_nothing() -> None:
    from lotproof.runner.evaluate.inputs import Sample
    from lotproof.runner.lot.cluster import _analyse_on_worker, software_fingerprint

    other = software_fingerprint()
    other["libraries"] = {**other["libraries"], "numpy": "0.0.1"}
    result = _analyse_on_worker(
        Sample(id="a.tif", files={}),
        recipe_raw=SYNTH_RECIPE.encode(),
        recipe_path="recipe.yaml",
        lot="/nonexistent",
        cache_root=None,
        fingerprint=other,
    )
    assert result.status == "incomplete"
    assert "differs from the machine that started the run" in result.reason
    assert "(run: 0.0.1)" in result.reason and result.worker


def test_a_local_run_never_imports_dask() -> None:
    code = (
        "import sys, runner, lotproof.runner.cli.main, lotproof.runner.lot.choose, lotproof.runner.jobs.run\n"
        "from lotproof.runner.lot.choose import make_executor\n"
        "make_executor('local', jobs=2, scheduler=None, workers=None)\n"
        "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed'))\n"
        "assert not bad and 'lotproof.runner.lot.cluster' not in sys.modules, bad\n"
    )
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
