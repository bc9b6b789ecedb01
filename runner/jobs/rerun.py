"""``lotproof rerun``: repeat a recorded run from its record and prove it gives the same.

The rerun uses only what the run folder holds: the recipe's exact bytes
(``recipe.yaml``, checked against the ledger) and the recorded inputs, found at
their recorded paths or, by checksum, anywhere under ``--lot``. It never uses the
cache. It writes a new run folder of its own (whose ledger names the original's
seal) and compares, image by image, every intermediate checksum, every measured
value, every object row and every verdict with the record.
"""

from __future__ import annotations

import os
from collections import defaultdict
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INTEGRITY, LotproofError
from lotproof.runner.evaluate.cache import NullStore
from lotproof.runner.evaluate.environment import environment, environment_differences
from lotproof.runner.evaluate.hashing import file_sha256
from lotproof.runner.evaluate.inputs import Sample
from lotproof.runner.jobs.run import RunSummary, run_lot
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.lotsheet import LotDetails, lot_details
from lotproof.runner.record.layout import IMAGES_FILE, OBJECTS_FILE, RECIPE_FILE
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run

__all__ = ["Difference", "RerunRefused", "RerunReport", "rerun"]


class RerunRefused(LotproofError):
    """The rerun cannot start (a missing or changed input, an altered record, --strict)."""

    def __init__(self, message: str, exit_code: int):
        super().__init__(message)
        self.exit_code = exit_code


@dataclass(frozen=True)
class Difference:
    image: str
    what: str
    recorded: str
    now: str

    def as_dict(self) -> dict[str, str]:
        return {"image": self.image, "what": self.what, "recorded": self.recorded, "now": self.now}


@dataclass
class RerunReport:
    original: Path
    rerun: RunSummary
    differences: list[Difference] = field(default_factory=list)
    environment: list[str] = field(default_factory=list)
    #: how many (image, step) checksums, values and verdicts were compared
    compared: int = 0

    @property
    def identical(self) -> bool:
        return not self.differences

    @property
    def exit_code(self) -> int:
        return 0 if self.identical else EXIT_INTEGRITY

    def first_per_image(self) -> list[Difference]:
        seen: set[str] = set()
        out = []
        for d in self.differences:
            if d.image not in seen:
                seen.add(d.image)
                out.append(d)
        return out

    def as_dict(self) -> dict[str, Any]:
        return {
            "original": str(self.original),
            "rerun_dir": str(self.rerun.run_dir),
            "result": "identical" if self.identical else "different",
            "compared": self.compared,
            "differences": [d.as_dict() for d in self.differences],
            "first_difference_per_image": [d.as_dict() for d in self.first_per_image()],
            "environment_differences": self.environment,
            "seal": self.rerun.seal,
        }


def _index_by_checksum(root: Path, wanted: dict[str, int]) -> dict[str, Path]:
    """Files under ``root`` whose sha256 is in ``wanted`` (sha256 -> size), found by size first."""
    sizes = set(wanted.values())
    found: dict[str, Path] = {}
    for folder, _, names in os.walk(root):
        for name in sorted(names):
            path = Path(folder) / name
            try:
                if not path.is_file() or path.stat().st_size not in sizes:
                    continue
                digest = file_sha256(path)
            except OSError:
                continue
            if digest in wanted and digest not in found:
                found[digest] = path
    return found


def _locate_inputs(
    events: list[dict[str, Any]], recorded_lot: Path, lot: Path | None
) -> tuple[Path, list[Sample]]:
    inputs = [e for e in events if e["type"] == "input"]
    images = [e for e in events if e["type"] == "image"]
    base = lot or recorded_lot
    located: dict[tuple[str, str], Path] = {}
    missing: list[str] = []
    changed: list[str] = []
    for e in inputs:
        candidate = base / e["path"]
        if candidate.is_file() and file_sha256(candidate) == e["sha256"]:
            located[(e["image"], e["input"])] = candidate
        elif candidate.is_file():
            changed.append(
                f"{e['path']} (sha256 now {file_sha256(candidate)[:16]}..., recorded {e['sha256'][:16]}...)"
            )
        else:
            missing.append(e["path"])
    unresolved = [e for e in inputs if (e["image"], e["input"]) not in located]
    if unresolved and lot is not None:
        found = _index_by_checksum(lot, {e["sha256"]: e["size"] for e in unresolved})
        for e in unresolved:
            if e["sha256"] in found:
                located[(e["image"], e["input"])] = found[e["sha256"]]
        still = {e["path"] for e in unresolved if (e["image"], e["input"]) not in located}
        missing = [m for m in missing if m in still]
        changed = [c for c in changed if c.split(" ")[0] in still]
    if missing or changed:
        parts = []
        if missing:
            parts.append("missing: " + ", ".join(missing))
        if changed:
            parts.append("changed: " + ", ".join(changed))
        where = (
            f"under {lot}" if lot else f"in {recorded_lot} (give --lot DIR to search by checksum)"
        )
        raise RerunRefused(
            "the recorded inputs are not all there " + where + "; " + "; ".join(parts),
            EXIT_BAD_INPUT,
        )
    by_image: dict[str, dict[str, Path]] = defaultdict(dict)
    for (image, name), path in located.items():
        by_image[image][name] = path
    samples = []
    for e in images:
        files = by_image.get(e["image"])
        if files is None:
            # never read the first time (unreadable, missing partner): try it the same way
            files = {"__recorded__": recorded_lot / e["image"]}
        samples.append(Sample(id=e["image"], files=files))
    samples.sort(key=lambda s: s.id)  # the lot's order; the ledger holds completion order
    return base, samples


def rerun(
    run_dir: Path, *, lot: Path | None = None, out: Path | None = None, strict: bool = False
) -> RerunReport:
    """Repeat the run recorded in ``run_dir`` and compare (see the module docstring)."""
    run_dir = Path(run_dir)
    report = verify_run(run_dir)
    if report.status != "intact":
        first = report.problems[0] if report.problems else report.status
        raise RerunRefused(f"{run_dir}: the record is {report.status}: {first}", EXIT_INTEGRITY)
    folder = RunFolder(run_dir)
    events = folder.events()
    start = events[0]
    recipe = parse_recipe(folder.recipe(), str(run_dir / RECIPE_FILE))
    now = environment()
    env_diffs = environment_differences(start, now)
    if strict:
        versions = [d for d in env_diffs if not d.startswith(("CPU", "SIMD", "machine"))]
        if versions:
            raise RerunRefused(
                "--strict: the software differs from the record: " + "; ".join(versions),
                EXIT_INTEGRITY,
            )
    base, samples = _locate_inputs(events, Path(start.get("lot", ".")), lot)
    # A sample that was never read keeps its one recorded path under the recipe's first input.
    first_input = next(iter(recipe.inputs))
    for sample in samples:
        if "__recorded__" in sample.files:
            sample.files = {first_input: sample.files.pop("__recorded__")}
            missing = [n for n in recipe.inputs if n not in sample.files]
            if missing:
                sample.problem = f"no file for input(s) {', '.join(missing)}"
    summary = run_lot(
        recipe,
        base,
        out or run_dir.parent,
        store=NullStore(),
        samples=samples,
        rerun_of=report.seal,
        details=_recorded_details(events, base),
    )
    result = RerunReport(original=run_dir, rerun=summary, environment=env_diffs)
    _compare(folder, events, summary, result)
    return result


def _recorded_details(events: list[dict[str, Any]], base: Path) -> LotDetails:
    """The lot's details as recorded (a rerun certifies the same lot), made by whoever reruns.

    The rerun reads no lot sheet: it uses only what the run folder holds. A record
    without a ``lot`` event gives the bare details (the lot and the operator).
    """
    now = lot_details(base, sheet=False)
    event = next((e for e in events if e.get("type") == "lot"), None)
    if event is None:
        return now
    recorded = LotDetails.from_event(event)
    return replace(recorded, path=now.path, operator=now.operator, station=None)


def _compare(
    folder: RunFolder, events: list[dict[str, Any]], summary: RunSummary, report: RerunReport
) -> None:
    recorded_steps = {
        (e["image"], e["step"]): e.get("checksum") for e in events if e["type"] == "step"
    }
    recorded_status = {
        e["image"]: (e["status"], e["reason"]) for e in events if e["type"] == "image"
    }
    order = summary.recipe.order
    for r in summary.results:
        status = recorded_status.get(r.id)
        if status is None:
            report.differences.append(Difference(r.id, "image", "not in the record", r.status))
            continue
        if status[0] != r.status:
            report.differences.append(
                Difference(r.id, "status", status[0], f"{r.status} ({r.reason})")
            )
        new = {rec.step: rec.checksum for rec in r.steps}
        for step in order:
            old = recorded_steps.get((r.id, step))
            checksum = new.get(step)
            if old is None or checksum is None:
                continue
            report.compared += 1
            if old != checksum:
                report.differences.append(
                    Difference(
                        r.id,
                        f"step {step} result checksum",
                        old[:16] + "...",
                        checksum[:16] + "...",
                    )
                )
    rerun_folder = RunFolder(summary.run_dir)
    for name in (IMAGES_FILE, OBJECTS_FILE):
        old_header, old_rows = folder.csv(name)
        new_header, new_rows = rerun_folder.csv(name)
        if old_header != new_header:
            report.differences.append(
                Difference("(lot)", f"{name} columns", ",".join(old_header), ",".join(new_header))
            )
            continue
        for i, (old_row, new_row) in enumerate(zip(old_rows, new_rows, strict=False)):
            for column, a, b in zip(old_header, old_row, new_row, strict=True):
                report.compared += 1
                if a != b:
                    image = old_row[0] if old_row else "?"
                    where = column if name == IMAGES_FILE else f"object row {i + 1}: {column}"
                    report.differences.append(Difference(image, where, a, b))
        if len(old_rows) != len(new_rows):
            report.differences.append(
                Difference("(lot)", f"{name} rows", str(len(old_rows)), str(len(new_rows)))
            )
    recorded_verdicts = {e["limit"]: e["verdict"] for e in events if e["type"] == "verdict"}
    for name, lv in summary.verdicts.limits.items():
        report.compared += 1
        if recorded_verdicts.get(name) != lv.verdict:
            report.differences.append(
                Difference("(lot)", f"limit {name}", str(recorded_verdicts.get(name)), lv.verdict)
            )
    lot_verdict = next((e["verdict"] for e in events if e["type"] == "lot-verdict"), None)
    report.compared += 1
    if lot_verdict != summary.verdicts.lot:
        report.differences.append(
            Difference("(lot)", "lot verdict", str(lot_verdict), summary.verdicts.lot)
        )
