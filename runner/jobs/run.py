"""``lotproof run`` as a function: recipe + lot -> run folder, verdicts, exit code."""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from lotproof.runner.errors import (
    EXIT_BAD_INPUT,
    EXIT_INVALID,
    EXIT_LIMIT_FAILED,
    EXIT_OK,
    LotproofError,
)
from lotproof.runner.evaluate.cache import DiskStore, NullStore, Store
from lotproof.runner.evaluate.environment import environment, utc_now
from lotproof.runner.evaluate.hashing import file_sha256
from lotproof.runner.evaluate.image import ImageResult
from lotproof.runner.evaluate.inputs import Sample, find_samples
from lotproof.runner.lot.base import LotExecutor, usable_cores
from lotproof.runner.lot.local import LocalExecutor
from lotproof.runner.recipe.git import git_info
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.recipe.lotsheet import LotDetails, lot_details
from lotproof.runner.recipe.model import Recipe
from lotproof.runner.record.folder import create_run_folder, write_previews, write_run_files
from lotproof.runner.record.layout import LEDGER_FILE, SUMS_FILE, image_folders, inside_run_folder
from lotproof.runner.record.ledger import LedgerWriter, write_sha256sums
from lotproof.runner.record.limits import FAIL, Verdicts, evaluate_limits
from lotproof.runner.record.recipe_approval import (
    RecipeApproval,
    RecipeNotApproved,
    find_recipe_approval,
)
from lotproof.runner.record.signing import load_private_key, load_trust, write_signature
from lotproof.runner.show.report import write_report

__all__ = ["RunSummary", "WritesIntoLotError", "exit_code_for", "run_lot", "usable_cores"]


class WritesIntoLotError(LotproofError, ValueError):
    """The output or cache folder lies inside the lot, or inside a sealed run folder:
    lotproof never writes into either (exit 2)."""

    exit_code = EXIT_INVALID


def _refuse_inside_lot(lot: Path, folder: Path, what: str) -> None:
    lot_real = lot.resolve()
    real = Path(os.path.abspath(folder)).resolve()
    if real == lot_real or lot_real in real.parents:
        raise WritesIntoLotError(
            f"{folder}: the {what} lies inside the lot folder {lot}; lotproof never writes "
            f"into a lot (its files would become inputs of the next run); choose one outside it"
        )


def _refuse_inside_a_run(folder: Path, what: str) -> None:
    run = Path(folder) if (Path(folder) / LEDGER_FILE).exists() else inside_run_folder(Path(folder))
    if run is not None:
        raise WritesIntoLotError(
            f"{folder}: the {what} lies inside the run folder {run}; a run folder is sealed "
            "and never written into; choose one outside it"
        )


@dataclass
class RunSummary:
    run_dir: Path
    recipe: Recipe
    lot: Path
    results: list[ImageResult]
    verdicts: Verdicts
    files: list[str]
    cache_location: str = "none"
    seal: str | None = None
    signed: bool = False
    #: the catalogue that recorded the run (password hidden), None when none did
    catalogue: str | None = None
    #: what people should know about the run beyond its verdicts (e.g. a catalogue miss)
    notes: list[str] = field(default_factory=list)
    details: LotDetails | None = None
    #: the recipe's approval found with a trust folder, or why there was none
    recipe_approval: RecipeApproval | None = None
    approval_note: str = ""

    @property
    def exit_code(self) -> int:
        return exit_code_for(self.verdicts)

    def as_json(self) -> dict[str, object]:
        """The ``run --json`` document."""
        return {
            "run_dir": str(self.run_dir),
            "method": self.recipe.name,
            "revision": self.recipe.revision,
            "recipe_sha256": self.recipe.sha256,
            "lot": str(self.lot),
            "verdict": self.verdicts.lot,
            "images": len(self.results),
            "incomplete": {r.id: r.reason for r in self.results if r.status != "ok"},
            "limits": {
                name: {
                    "value": lv.value if lv.over != "each" else None,
                    "unit": lv.unit,
                    "bound": lv.bound_text(),
                    "verdict": lv.verdict,
                    "images": {image: verdict for image, (_, verdict) in lv.per_image.items()},
                }
                for name, lv in self.verdicts.limits.items()
            },
            "seal": self.seal,
            "signed": self.signed,
            "lot_details": None if self.details is None else self.details.document(),
            "recipe_approval": None
            if self.recipe_approval is None
            else {
                "approver": self.recipe_approval.approver,
                "time_utc": self.recipe_approval.time_utc,
                "key": self.recipe_approval.key,
            },
            "steps": self.step_counts(),
            "cache": self.cache_location,
            "catalogue": self.catalogue,
            "notes": list(self.notes),
            "exit_code": self.exit_code,
        }

    def step_counts(self) -> dict[str, int]:
        """(image, step) results computed and reused (loaded or not needed) over the lot."""
        records = [record for r in self.results for record in r.steps]
        computed = sum(1 for record in records if record.cache == "computed")
        return {"computed": computed, "reused": len(records) - computed}


def exit_code_for(verdicts: Verdicts) -> int:
    """0 every limit passed; 1 a limit failed; 3 an image could not be analysed.

    Bad data (3) outranks a failed limit (1): a lot with an unreadable image needs a
    person before anything else, and its verdict is never ``pass`` either way.
    """
    if verdicts.incomplete_images or verdicts.images == 0:
        return EXIT_BAD_INPUT
    if verdicts.lot == FAIL:
        return EXIT_LIMIT_FAILED
    if verdicts.lot != "pass":
        return EXIT_BAD_INPUT
    return EXIT_OK


def _image_events(ledger: LedgerWriter, recipe: Recipe, result: ImageResult, folder: str) -> None:
    """One image's events (inputs, steps, the image), made durable together."""
    events: list[tuple[str, dict[str, Any]]] = []
    for item in result.inputs:
        events.append(
            (
                "input",
                {
                    "image": result.id,
                    "input": item["input"],
                    "path": item["path"],
                    "size": item["size"],
                    "sha256": item["sha256"],
                    "shape": item["shape"],
                    "dtype": item["dtype"],
                    "calibration": item["calibration"],
                },
            )
        )
    for record in result.steps:
        events.append(
            (
                "step",
                {
                    "image": result.id,
                    "step": record.step,
                    "kind": record.kind,
                    "version": record.version,
                    "to": list(recipe.steps[record.step].to),
                    "key": record.key,
                    "checksum": record.checksum,
                    "cache": record.cache,
                    "seconds": round(record.seconds, 6),
                },
            )
        )
    events.append(
        (
            "image",
            {
                "image": result.id,
                "status": result.status,
                "reason": result.reason,
                "worker": result.worker,
                "notes": list(result.notes),
                "folder": folder,
            },
        )
    )
    ledger.append_group(events)


def _recipe_approval(
    recipe: Recipe, trust: Path | None, required: bool
) -> tuple[RecipeApproval | None, str]:
    """The recipe's valid approval by a key of ``trust`` (or None and why); refused when required."""
    if trust is None:
        if required:
            raise RecipeNotApproved(
                "--require-approved needs a trust folder of public keys (--trust DIR or "
                "LOTPROOF_TRUST); nothing was run"
            )
        return None, ""
    keys = load_trust(trust)
    try:
        return find_recipe_approval(recipe, keys), ""
    except RecipeNotApproved as err:
        if required:
            raise RecipeNotApproved(
                f"{recipe.label} is not approved: {err}; nothing was run"
            ) from None
        return None, str(err)


def run_lot(
    recipe: Recipe | str | Path,
    lot: str | Path,
    out: str | Path,
    *,
    store: Store | None = None,
    jobs: int = 1,
    executor: LotExecutor | None = None,
    sign: Path | None = None,
    rerun_of: str | None = None,
    samples: list[Sample] | None = None,
    on_start: Callable[[int], None] | None = None,
    on_image: Callable[[ImageResult], None] | None = None,
    db: str | None = None,
    catalogue: bool = True,
    details: LotDetails | None = None,
    trust: Path | None = None,
    require_approved: bool = False,
) -> RunSummary:
    """Run ``recipe`` on every image of ``lot`` and write a new run folder under ``out``.

    ``store`` is the cache (``None``: no cache); ``executor`` where images are
    analysed (default: a local pool of ``jobs`` processes); ``sign`` a private
    Ed25519 key to sign the seal with. The run folder and its
    ledger are created before the first image is read, so an interrupted run leaves
    a folder that ``verify`` reports as unfinished.

    ``details`` are the lot's details for its certificate (default: the lot's
    lot sheet, if it has one, and the login name as operator), recorded in the
    ledger's ``lot`` event and in ``verdicts.json``. With ``trust`` (a folder of
    public keys) the recipe's approval is looked for and, when valid, recorded
    (``recipe-approval`` event); ``require_approved`` refuses a recipe without one.

    The finished, sealed run is then recorded in the catalogue of runs (``db``, a
    database URL; default ``$LOTPROOF_DB`` or ``OUT/history.sqlite``; ``catalogue=False``
    records nothing). The catalogue is an index: when it cannot record the run,
    the run stays complete and sealed, a note in the summary says so, and
    ``lotproof history --rebuild OUT`` records it later.

    Raises
    ------
    RecipeError
        When the recipe is invalid (nothing ran).
    InputError
        When the lot folder cannot be used at all (nothing ran).
    WritesIntoLotError
        When ``out`` or the cache folder lies inside the lot (nothing ran).
    LotSheetError
        When the lot's lot sheet is invalid (nothing ran).
    RecipeNotApproved
        With ``require_approved``, when the recipe has no valid approval by a
        key of ``trust`` (nothing ran).
    """
    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    store = store if store is not None else NullStore()
    executor = executor if executor is not None else LocalExecutor(jobs)
    lot = Path(lot)
    if lot.is_dir():
        _refuse_inside_lot(lot, Path(out), "output folder")
        if isinstance(store, DiskStore):
            _refuse_inside_lot(lot, store.root, "cache folder")
    _refuse_inside_a_run(Path(out), "output folder")
    if isinstance(store, DiskStore):
        _refuse_inside_a_run(store.root, "cache folder")
        store.check_folder()  # another folder's files are never adopted as a cache
    if samples is None:
        samples = find_samples(lot, recipe.inputs)
    if sign is not None:
        load_private_key(sign)  # a bad key fails before anything runs
    if details is None:
        details = lot_details(lot)
    approval, approval_note = _recipe_approval(recipe, trust, require_approved)
    run_dir = create_run_folder(Path(out), recipe)
    with LedgerWriter(run_dir / LEDGER_FILE) as ledger:
        start = environment()
        if rerun_of is not None:
            start["rerun_of"] = rerun_of
        start["lot"] = str(lot)
        start["cache"] = store.location
        start["executor"] = executor.description
        ledger.append("run-start", **start)
        ledger.append(
            "recipe",
            path=recipe.path,
            sha256=recipe.sha256,
            name=recipe.name,
            revision=recipe.revision,
            git=git_info(Path(recipe.path)),
        )
        ledger.append("lot", **details.event())
        if approval is not None:
            ledger.append("recipe-approval", **approval.event())
        if on_start is not None:
            on_start(len(samples))

        figures: list[str] = []
        folders = image_folders(sample.id for sample in samples)

        def done(result: ImageResult) -> None:
            # write the small display images now, so the parent never holds a lot's worth
            figures.extend(write_previews(run_dir, result, folders))
            result.preview = {}
            _image_events(ledger, recipe, result, folders[result.id])
            if on_image is not None:
                on_image(result)

        results = executor.map(recipe, samples, lot, store, done)
        verdicts = evaluate_limits(recipe, results)
        files = write_run_files(run_dir, recipe, results, verdicts, lot, folders, details)
        files += sorted(figures)
        for name, lv in verdicts.limits.items():
            ledger.append(
                "verdict",
                limit=name,
                value=lv.value,
                unit=lv.unit,
                over=lv.over,
                bound=lv.bound_text(),
                verdict=lv.verdict,
            )
        ledger.append("lot-verdict", verdict=verdicts.lot)
        files.append(write_report(run_dir))
        write_sha256sums(run_dir, files)
        files.append(SUMS_FILE)
        for name in files:
            path = run_dir / name
            ledger.append("output", path=name, sha256=file_sha256(path), size=path.stat().st_size)
        summary = RunSummary(run_dir, recipe, lot, results, verdicts, files, store.location)
        summary.details, summary.recipe_approval = details, approval
        summary.approval_note = approval_note
        seal = ledger.append_end(time_utc=utc_now(), exit_code=summary.exit_code)
    summary.seal = seal
    if sign is not None:
        write_signature(run_dir, seal, sign)
        summary.signed = True
    if catalogue:
        _record_in_catalogue(summary, Path(out), db)
    return summary


def _record_in_catalogue(summary: RunSummary, out: Path, db: str | None) -> None:
    """Record the sealed run in the catalogue; a failure becomes a note, never an error.

    The run folder is the source of truth and is complete before this is called;
    nothing here writes to it.
    """
    from lotproof.runner.history.catalogue import catalogue_url, record_run, shown_url

    url: str | None = None
    try:
        url = catalogue_url(out, db)
        record_run(summary.run_dir, url, expected_seal=summary.seal)
    except Exception as err:  # the run is sealed; an index that missed it is rebuilt later
        where = shown_url(url) if url else "the catalogue"
        again = f"lotproof history --rebuild {out}" + (f" --db {where}" if db else "")
        summary.notes.append(
            f"{where} did not record this run ({err}); the run folder is complete and sealed, "
            f"and `{again}` records it"
        )
        return
    summary.catalogue = shown_url(url)
