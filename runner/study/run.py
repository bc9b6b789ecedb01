"""``lotproof validate`` as a function: plan -> measurements -> statistics -> sealed study folder.

:func:`run_study` measures every image the plan names with the recipe (and, for
robustness, with every moved recipe) through the same per-image evaluation, cache
and executors as a run (:mod:`lotproof.runner.lot`), computes the statistics
(:mod:`lotproof.runner.study.stats`), judges the criteria
(:mod:`lotproof.runner.study.criteria`) and writes a new study folder sealed like a
run folder: its ledger (:class:`~lotproof.runner.record.ledger.LedgerWriter`) records
the plan, the recipe, every variant, every input, every (image, step) with its
cache key and checksum, the criteria and the verdict, then every output file and
``run-end``; ``SHA256SUMS`` lists the outputs; ``lotproof verify`` checks it.

Every output file follows from the plan, the recipe and the images alone (no
clock, host, cache or executor in them): the same plan on the same images gives
the same files again, the ledger (times, host, cache use) aside.

Ledger events beside a run's (fields beside ``seq``, ``type``, ``prev``):

``plan``           path, sha256, name, revision, git
``variant``        parameter, direction, move, value, path, sha256
``input``          image (``SET/ID``), set, input, path, size, sha256, shape, dtype, calibration
``step``           image, variant, step, kind, version, to, key, checksum, cache, seconds
``image``          image, variant, status, reason, worker, notes
``criterion``      criterion, rule, verdict
``study-verdict``  verdict
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from lotproof.runner.errors import (
    EXIT_BAD_INPUT,
    EXIT_LIMIT_FAILED,
    EXIT_OK,
    InputError,
)
from lotproof.runner.evaluate.cache import NullStore, Store
from lotproof.runner.evaluate.environment import environment, utc_now
from lotproof.runner.evaluate.hashing import file_sha256
from lotproof.runner.evaluate.image import ImageResult
from lotproof.runner.evaluate.inputs import Sample, find_samples
from lotproof.runner.jobs.run import WritesIntoLotError
from lotproof.runner.lot.base import LotExecutor
from lotproof.runner.lot.local import LocalExecutor
from lotproof.runner.recipe.git import git_info
from lotproof.runner.recipe.model import Recipe
from lotproof.runner.record.folder import CAUTION, create_folder, format_number, write_bytes
from lotproof.runner.record.layout import (
    LEDGER_FILE,
    MEASUREMENTS_FILE,
    PLAN_FILE,
    RECIPE_FILE,
    ROBUSTNESS_FILE,
    SUMS_FILE,
    VALIDATION_FILE,
    design_path,
    is_within,
    variant_path,
)
from lotproof.runner.record.ledger import LedgerWriter, write_sha256sums
from lotproof.runner.record.limits import FAIL, INCOMPLETE, PASS, evaluate_limits
from lotproof.runner.show.study_report import write_study_report
from lotproof.runner.study import stats
from lotproof.runner.study.criteria import judge, study_verdict
from lotproof.runner.study.plan import FORMAT, Plan, load_plan
from lotproof.runner.study.variants import DIRECTIONS

__all__ = ["BASELINE", "StudySummary", "run_study", "study_exit_code"]

#: the variant name of the recipe as written
BASELINE = "baseline"

#: what every validation.json says of its rules
RULES = (
    "ANOVA method, two-way crossed with interaction; negative variance components are set to 0 "
    "and named; the interaction is pooled into repeatability when its p-value is above the "
    "plan's limit; %GRR of tolerance = 100 * 6 GRR / (USL - LSL); ndc = floor(1.41 PV / GRR); "
    "bias = mean(measured - known) with a two-sided t interval; linearity = least squares of "
    "bias on the known value; a verdict flip is an image whose verdict on the recipe's limits "
    "changes when one parameter moves by its step either way; an image that could not be "
    "analysed never counts as passing"
)

OnImage = Callable[[str, str, ImageResult], None]


@dataclass
class StudySummary:
    """What :func:`run_study` did: the study folder, the document, the verdict, the seal."""

    study_dir: Path
    plan: Plan
    validation: dict[str, Any]
    files: list[str]
    #: variant name -> {"computed": n, "reused": m} (image, step) results
    steps: dict[str, dict[str, int]] = field(default_factory=dict)
    cache_location: str = "none"
    seal: str | None = None

    @property
    def verdict(self) -> str:
        return str(self.validation["verdict"])

    @property
    def exit_code(self) -> int:
        return study_exit_code(self.validation)

    def as_json(self) -> dict[str, Any]:
        """The ``validate --json`` document."""
        return {
            "study_dir": str(self.study_dir),
            "study": self.plan.name,
            "revision": self.plan.revision,
            "plan_sha256": self.plan.sha256,
            "method": self.plan.recipe.name,
            "method_revision": self.plan.recipe.revision,
            "recipe_sha256": self.plan.recipe.sha256,
            "verdict": self.verdict,
            "images": self.validation["images"],
            "criteria": {
                name: {"rule": c["rule"], "verdict": c["verdict"]}
                for name, c in self.validation["criteria"].items()
            },
            "steps": self.steps,
            "cache": self.cache_location,
            "seal": self.seal,
            "exit_code": self.exit_code,
        }


def study_exit_code(validation: dict[str, Any]) -> int:
    """0 every criterion passed; 1 one failed; 3 an image could not be analysed (or a criterion
    could not be judged): bad data outranks a failed criterion, as in a run."""
    if validation["images"]["incomplete"] or validation["verdict"] == INCOMPLETE:
        return EXIT_BAD_INPUT
    if validation["verdict"] == FAIL:
        return EXIT_LIMIT_FAILED
    return EXIT_OK


# ---------------------------------------------------------------- images


@dataclass(frozen=True)
class _Item:
    """One image of the study: its set, its id in the set's folder, its sample."""

    set: str
    id: str
    sample: Sample

    @property
    def key(self) -> str:
        return f"{self.set}/{self.id}"


def _items(plan: Plan) -> dict[str, list[_Item]]:
    """Every image the plan names, by set; an :class:`InputError` for one that is not there."""
    recipe = plan.recipe
    out: dict[str, list[_Item]] = {}
    missing: list[str] = []
    for name, design in (("precision", plan.precision), ("trueness", plan.trueness)):
        if design is None:
            continue
        folder = design.folder
        ids = [image.image for image in design.images]
        if len(recipe.inputs) == 1:
            # one input: the design names each image's file, whatever the recipe's glob
            (input_name,) = recipe.inputs
            samples = {i: Sample(id=i, files={input_name: folder / i}) for i in ids}
            missing += [f"{folder / i}" for i in ids if not (folder / i).is_file()]
        else:
            found = {s.id: s for s in find_samples(folder, recipe.inputs)}
            missing += [f"{folder / i}" for i in ids if i not in found]
            samples = {i: found[i] for i in ids if i in found}
        out[name] = [_Item(name, i, samples[i]) for i in ids if i in samples]
    if missing:
        more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
        raise InputError(
            f"the plan names images that are not there: {', '.join(missing[:5])}{more}"
        )
    return out


def _refuse_inside(plan: Plan, out: Path, store: Store) -> None:
    folders = [d.folder for d in (plan.precision, plan.trueness) if d is not None]
    for folder in folders:
        for what, path in (("output folder", out), ("cache folder", Path(store.location))):
            if store.location == "none" and what == "cache folder":
                continue
            if is_within(folder, path):
                raise WritesIntoLotError(
                    f"{path}: the {what} lies inside the image folder {folder}; lotproof never "
                    "writes into the images it measures; choose one outside it"
                )


# ---------------------------------------------------------------- ledger


def _image_events(
    ledger: LedgerWriter, recipe: Recipe, item: _Item, variant: str, result: ImageResult
) -> None:
    events: list[tuple[str, dict[str, Any]]] = []
    if variant == BASELINE:
        for entry in result.inputs:
            events.append(
                (
                    "input",
                    {
                        "image": item.key,
                        "set": item.set,
                        "input": entry["input"],
                        "path": entry["path"],
                        "size": entry["size"],
                        "sha256": entry["sha256"],
                        "shape": entry["shape"],
                        "dtype": entry["dtype"],
                        "calibration": entry["calibration"],
                    },
                )
            )
    for record in result.steps:
        events.append(
            (
                "step",
                {
                    "image": item.key,
                    "variant": variant,
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
                "image": item.key,
                "variant": variant,
                "status": result.status,
                "reason": result.reason,
                "worker": result.worker,
                "notes": list(result.notes),
            },
        )
    )
    ledger.append_group(events)


# ---------------------------------------------------------------- statistics


def _value(result: ImageResult | None, name: str) -> float:
    if result is None or result.status != "ok":
        return math.nan
    step, _, value = name.partition(".")
    return float(result.values.get((step, value), math.nan))


def _precision_doc(plan: Plan, name: str, results: dict[str, ImageResult]) -> dict[str, Any]:
    design = plan.precision
    studied = plan.value(name)
    keys = (
        "repeatability_sd",
        "reproducibility_sd",
        "operator_sd",
        "interaction_sd",
        "grr_sd",
        "part_sd",
        "total_sd",
        "grr_percent_tolerance",
        "grr_percent_total",
        "ndc",
    )
    empty: dict[str, Any] = dict.fromkeys(keys)
    empty.update(anova=None, anova_pooled=None, interaction=None, cell_means=None)
    if design is None:
        return empty
    parts, operators = list(design.parts), list(design.operators)
    values = np.full((len(parts), len(operators), design.replicates), np.nan)
    filled: dict[tuple[int, int], int] = {}
    for image in design.images:
        i, j = parts.index(image.part), operators.index(image.operator)
        k = filled.get((i, j), 0)
        filled[(i, j)] = k + 1
        values[i, j, k] = _value(results.get(image.image), name)
    cell_means = {
        operator: {part: stats_number(float(np.mean(values[i, j]))) for i, part in enumerate(parts)}
        for j, operator in enumerate(operators)
    }
    if not bool(np.isfinite(values).all()):
        missing = int(np.sum(~np.isfinite(values)))
        empty.update(
            cell_means=cell_means,
            precision_problem=f"{missing} image(s) gave no value of {name}; not computed",
        )
        return empty
    gauge = stats.gauge_rr(values, tolerance=studied.tolerance, pool_above=design.pool_above)
    doc = gauge.as_dict()
    doc["cell_means"] = cell_means
    doc["parts_order"] = parts
    doc["operators_order"] = operators
    return doc


def stats_number(value: float | None) -> float | None:
    """A JSON-ready number: None for None, NaN or an infinity."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def _trueness_doc(plan: Plan, name: str, results: dict[str, ImageResult]) -> dict[str, Any]:
    design = plan.trueness
    doc: dict[str, Any] = {"bias": None, "linearity": None}
    if design is None or not any(name in image.known for image in design.images):
        return doc
    confidence = design.confidence
    rows = [
        (image.reference, image.known[name], _value(results.get(image.image), name))
        for image in design.images
        if name in image.known
    ]
    if not all(math.isfinite(measured) for _, _, measured in rows):
        doc["trueness_problem"] = f"an image gave no value of {name}; bias not computed"
        doc["linearity_problem"] = doc["trueness_problem"]
        return doc
    biases = []
    for reference in design.references:
        ref_rows = [r for r in rows if r[0] == reference]
        if not ref_rows:
            continue
        result = stats.bias_test(
            [m for _, _, m in ref_rows], [k for _, k, _ in ref_rows], confidence=confidence
        )
        biases.append({"name": reference, **result.as_dict()})
    doc["bias"] = biases
    known = [k for _, k, _ in rows]
    try:
        fit = stats.linearity(known, [m - k for _, k, m in rows], confidence=confidence)
        doc["linearity"] = fit.as_dict()
    except ValueError as err:
        doc["linearity_problem"] = f"no linearity line: {err}"
    return doc


def _robustness_values(plan: Plan) -> list[tuple[str, str]]:
    """(value, unit) of every studied value and every value a recipe limit bounds."""
    out = [(v.name, v.unit) for v in plan.values]
    for limit in plan.recipe.limits.values():
        name = f"{limit.step}.{limit.value}"
        if name not in [n for n, _ in out]:
            out.append((name, limit.unit))
    return out


def _tolerance_of(plan: Plan, name: str) -> float | None:
    studied = [v for v in plan.values if v.name == name]
    if studied:
        return studied[0].tolerance
    for limit in plan.recipe.limits.values():
        if f"{limit.step}.{limit.value}" == name and None not in (limit.low, limit.high):
            return float(limit.high) - float(limit.low)  # type: ignore[arg-type]
    return None


def _verdicts(
    recipe: Recipe, items: list[_Item], results: dict[str, ImageResult]
) -> dict[str, str]:
    """Image key -> the image's verdict on the recipe's limits, set by set."""
    out: dict[str, str] = {}
    for set_name in ("precision", "trueness"):
        chosen = [i for i in items if i.set == set_name and i.key in results]
        if not chosen:
            continue
        verdicts = evaluate_limits(recipe, [results[i.key] for i in chosen])
        for item in chosen:
            out[item.key] = verdicts.image_verdict(item.id)
    return out


def _robustness_doc(
    plan: Plan,
    items: list[_Item],
    baseline: dict[str, ImageResult],
    moved: dict[str, dict[str, dict[str, ImageResult]]],
) -> dict[str, Any] | None:
    if plan.robustness is None:
        return None
    base_verdicts = _verdicts(plan.recipe, items, baseline)
    parameters: dict[str, Any] = {}
    for move in plan.robustness.moves:
        runs = moved[move.parameter]
        verdicts = {d: _verdicts(move.variant(d).recipe, items, runs[d]) for d in DIRECTIONS}
        incomplete = sorted(
            i.key for i in items for d in DIRECTIONS if runs[d][i.key].status != "ok"
        )
        flips = []
        for item in items:
            seen = {d: verdicts[d].get(item.key, INCOMPLETE) for d in DIRECTIONS}
            base = base_verdicts.get(item.key, INCOMPLETE)
            judged = [base, *seen.values()]
            if INCOMPLETE in judged:
                continue
            if any(v != base for v in seen.values()):
                flips.append({"image": item.key, "baseline": base, **seen})
        changes: dict[str, Any] = {}
        for name, unit in _robustness_values(plan):
            y0 = np.array([_value(baseline.get(i.key), name) for i in items])
            ym = np.array([_value(runs["minus"].get(i.key), name) for i in items])
            yp = np.array([_value(runs["plus"].get(i.key), name) for i in items])
            ok = np.isfinite(y0) & np.isfinite(ym) & np.isfinite(yp)
            tolerance = _tolerance_of(plan, name)
            if not bool(ok.any()):
                changes[name] = {
                    "unit": unit,
                    "images": 0,
                    "change_per_step": None,
                    "percent_of_tolerance": None,
                }
                continue
            per_step = (yp[ok] - ym[ok]) / 2.0
            mean = float(np.mean(per_step))
            changes[name] = {
                "unit": unit,
                "images": int(ok.sum()),
                "change_per_step": stats_number(mean),
                "max_abs_change_per_step": stats_number(float(np.max(np.abs(per_step)))),
                "minus_shift": stats_number(float(np.mean(ym[ok] - y0[ok]))),
                "plus_shift": stats_number(float(np.mean(yp[ok] - y0[ok]))),
                "tolerance": tolerance,
                "percent_of_tolerance": (
                    None if tolerance is None else stats_number(100.0 * mean / tolerance)
                ),
            }
        parameters[move.parameter] = {
            "move": move.written,
            "baseline": move.baseline_text,
            "minus": {
                "value": move.variant("minus").value_text,
                "recipe_sha256": move.variant("minus").recipe.sha256,
                "recipe": variant_path(move.parameter, "minus"),
            },
            "plus": {
                "value": move.variant("plus").value_text,
                "recipe_sha256": move.variant("plus").recipe.sha256,
                "recipe": variant_path(move.parameter, "plus"),
            },
            "changes": changes,
            "flips": flips,
            "incomplete_images": incomplete,
        }
    return {"images": plan.robustness.images, "parameters": parameters}


def _validation(
    plan: Plan,
    items: dict[str, list[_Item]],
    baseline: dict[str, ImageResult],
    moved: dict[str, dict[str, dict[str, ImageResult]]],
    robust_items: list[_Item],
) -> dict[str, Any]:
    by_set = {
        s: {item.id: baseline[item.key] for item in items.get(s, [])}
        for s in ("precision", "trueness")
    }
    robustness = _robustness_doc(plan, robust_items, baseline, moved)
    values: dict[str, Any] = {}
    for studied in plan.values:
        doc: dict[str, Any] = {
            "unit": studied.unit,
            "tolerance": studied.tolerance,
            "tolerance_source": studied.tolerance_source,
        }
        doc.update(_precision_doc(plan, studied.name, by_set["precision"]))
        doc.update(_trueness_doc(plan, studied.name, by_set["trueness"]))
        doc["robustness"] = (
            None
            if robustness is None
            else {p: m["changes"][studied.name] for p, m in robustness["parameters"].items()}
        )
        values[studied.name] = doc
    incomplete = {key: r.reason for key, r in baseline.items() if r.status != "ok"}
    for parameter, runs in moved.items():
        for direction, results in runs.items():
            for key, r in results.items():
                if r.status != "ok":
                    incomplete.setdefault(f"{key} ({parameter} {direction})", r.reason)
    document: dict[str, Any] = {
        "format": FORMAT,
        "study": {
            "name": plan.name,
            "revision": plan.revision,
            "summary": plan.summary,
            "plan_sha256": plan.sha256,
        },
        "method": {
            "name": plan.recipe.name,
            "revision": plan.recipe.revision,
            "recipe_sha256": plan.recipe.sha256,
        },
        "verdict": PASS,
        "images": {
            "precision": len(items.get("precision", [])),
            "trueness": len(items.get("trueness", [])),
            "incomplete": incomplete,
        },
        "design": _design_doc(plan),
        "values": values,
        "robustness": robustness,
        "criteria": {},
        "rules": RULES,
        "caution": CAUTION,
    }
    document["criteria"] = {c.name: judge(c, document) for c in plan.criteria}
    document["verdict"] = study_verdict(document["criteria"], len(incomplete))
    return document


def _design_doc(plan: Plan) -> dict[str, Any]:
    doc: dict[str, Any] = {}
    if plan.precision is not None:
        doc["precision"] = {
            "parts": list(plan.precision.parts),
            "operators": list(plan.precision.operators),
            "replicates": plan.precision.replicates,
            "pool_interaction_above": plan.precision.pool_above,
        }
    if plan.trueness is not None:
        doc["trueness"] = {
            "references": list(plan.trueness.references),
            "source": plan.trueness.source,
            "confidence": plan.trueness.confidence,
        }
    return doc


# ---------------------------------------------------------------- files


def _csv(rows: list[list[str]]) -> bytes:
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerows(rows)
    return buffer.getvalue().encode("utf-8")


def _header(name: str, unit: str) -> str:
    return f"{name} [{unit}]"


def _measurements_csv(
    plan: Plan,
    items: dict[str, list[_Item]],
    baseline: dict[str, ImageResult],
    verdicts: dict[str, str],
) -> bytes:
    studied = list(plan.values)
    header = [
        "set",
        "image",
        "status",
        "verdict",
        "reason",
        "part",
        "operator",
        "replicate",
        "reference",
    ]
    header += [_header(v.name, v.unit) for v in studied]
    header += [_header(f"known {v.name}", v.unit) for v in studied]
    rows = [header]
    design_p = {i.image: i for i in plan.precision.images} if plan.precision else {}
    design_t = {i.image: i for i in plan.trueness.images} if plan.trueness else {}
    for set_name in ("precision", "trueness"):
        for item in items.get(set_name, []):
            result = baseline[item.key]
            p, t = design_p.get(item.id), design_t.get(item.id)
            row = [
                set_name,
                item.id,
                result.status,
                verdicts.get(item.key, INCOMPLETE),
                result.reason,
                p.part if p and set_name == "precision" else "",
                p.operator if p and set_name == "precision" else "",
                p.replicate if p and set_name == "precision" else "",
                t.reference if t and set_name == "trueness" else "",
            ]
            row += [format_number(_value(result, v.name)) for v in studied]
            row += [
                format_number(t.known.get(v.name)) if t and set_name == "trueness" else ""
                for v in studied
            ]
            rows.append(row)
    return _csv(rows)


def _robustness_csv(
    plan: Plan,
    items: list[_Item],
    baseline: dict[str, ImageResult],
    moved: dict[str, dict[str, dict[str, ImageResult]]],
) -> bytes:
    assert plan.robustness is not None
    columns = _robustness_values(plan)
    header = ["parameter", "direction", "value", "image", "status", "verdict"]
    header += [_header(n, u) for n, u in columns]
    rows = [header]
    base_verdicts = _verdicts(plan.recipe, items, baseline)
    for move in plan.robustness.moves:
        variants = [(BASELINE, move.baseline_text, plan.recipe, baseline)] + [
            (d, move.variant(d).value_text, move.variant(d).recipe, moved[move.parameter][d])
            for d in DIRECTIONS
        ]
        for direction, value_text, recipe, results in variants:
            verdicts = base_verdicts if direction == BASELINE else _verdicts(recipe, items, results)
            for item in items:
                result = results[item.key]
                row = [
                    move.parameter,
                    direction,
                    value_text,
                    item.key,
                    result.status,
                    verdicts.get(item.key, INCOMPLETE),
                ]
                row += [format_number(_value(result, n)) for n, _ in columns]
                rows.append(row)
    return _csv(rows)


def _json(data: Any) -> bytes:
    return (json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode()


# ---------------------------------------------------------------- the study


def run_study(
    plan: Plan | str | Path,
    out: str | Path,
    *,
    store: Store | None = None,
    jobs: int = 1,
    executor: LotExecutor | None = None,
    on_image: OnImage | None = None,
) -> StudySummary:
    """Run the validation ``plan`` and write a new, sealed study folder under ``out``.

    ``store`` is the cache (``None``: none; a robustness sweep then computes every
    step of every variant again); ``executor`` where images are analysed (default:
    a local pool of ``jobs`` processes); ``on_image(set, variant, result)`` is called
    as each image is done.

    Raises
    ------
    PlanError
        When the plan is invalid (nothing ran).
    InputError
        When an image the plan names is not there (nothing ran).
    WritesIntoLotError
        When ``out`` or the cache lies inside an image folder (nothing ran).
    """
    if not isinstance(plan, Plan):
        plan = load_plan(plan)
    store = store if store is not None else NullStore()
    # the study draws no per-image pictures: the local executor makes none
    executor = executor if executor is not None else LocalExecutor(jobs, preview=False)
    out = Path(out)
    _refuse_inside(plan, out, store)
    items = _items(plan)
    recipe = plan.recipe
    study_dir = create_folder(out, plan.name, plan.revision)
    steps: dict[str, dict[str, int]] = {}
    with LedgerWriter(study_dir / LEDGER_FILE) as ledger:
        start = environment()
        start["study"] = plan.path
        start["cache"] = store.location
        start["executor"] = executor.description
        ledger.append("run-start", **start)
        ledger.append(
            "plan",
            path=plan.path,
            sha256=plan.sha256,
            name=plan.name,
            revision=plan.revision,
            git=git_info(Path(plan.path)),
        )
        ledger.append(
            "recipe",
            path=recipe.path,
            sha256=recipe.sha256,
            name=recipe.name,
            revision=recipe.revision,
            git=git_info(Path(recipe.path)),
        )
        moves = plan.robustness.moves if plan.robustness is not None else ()
        for move in moves:
            for direction in DIRECTIONS:
                variant = move.variant(direction)
                ledger.append(
                    "variant",
                    parameter=move.parameter,
                    direction=direction,
                    move=move.written,
                    value=variant.value_text,
                    path=variant_path(move.parameter, direction),
                    sha256=variant.recipe.sha256,
                )

        baseline_inputs: dict[str, list[str]] = {}

        def measure(
            name: str, variant_recipe: Recipe, chosen: list[_Item]
        ) -> dict[str, ImageResult]:
            counts = steps.setdefault(name, {"computed": 0, "reused": 0})
            found: dict[str, ImageResult] = {}
            for set_name in ("precision", "trueness"):
                group = [i for i in chosen if i.set == set_name]
                if not group:
                    continue
                folder = (plan.precision if set_name == "precision" else plan.trueness).folder  # type: ignore[union-attr]
                by_id = {i.id: i for i in group}

                def done(result: ImageResult, by_id: dict[str, _Item] = by_id) -> None:
                    item = by_id[result.id]
                    result.preview = {}
                    expected = baseline_inputs.get(item.key)
                    got = [e["sha256"] for e in result.inputs]
                    if expected is not None and result.status == "ok" and got != expected:
                        result.fail(f"{item.key}: the file changed during the study")
                    _image_events(ledger, variant_recipe, item, name, result)
                    for record in result.steps:
                        counts["computed" if record.cache == "computed" else "reused"] += 1
                    if on_image is not None:
                        on_image(item.set, name, result)

                results = executor.map(
                    variant_recipe, [i.sample for i in group], folder, store, done
                )
                for result in results:
                    found[by_id[result.id].key] = result
            return found

        every = [i for s in ("precision", "trueness") for i in items.get(s, [])]
        baseline = measure(BASELINE, recipe, every)
        for key, result in baseline.items():
            baseline_inputs[key] = [e["sha256"] for e in result.inputs]
        robust_items = [
            i
            for i in every
            if plan.robustness is not None and plan.robustness.images in ("all", i.set)
        ]
        moved: dict[str, dict[str, dict[str, ImageResult]]] = {}
        for move in moves:
            moved[move.parameter] = {
                d: measure(f"{move.parameter} {d}", move.variant(d).recipe, robust_items)
                for d in DIRECTIONS
            }

        validation = _validation(plan, items, baseline, moved, robust_items)
        verdicts = _verdicts(recipe, every, baseline)
        files = _write_files(
            plan, study_dir, items, baseline, moved, robust_items, validation, verdicts
        )
        for name, entry in validation["criteria"].items():
            ledger.append("criterion", criterion=name, rule=entry["rule"], verdict=entry["verdict"])
        ledger.append("study-verdict", verdict=validation["verdict"])
        files.append(write_study_report(study_dir))
        write_sha256sums(study_dir, files)
        files.append(SUMS_FILE)
        for name in files:
            path = study_dir / name
            ledger.append("output", path=name, sha256=file_sha256(path), size=path.stat().st_size)
        summary = StudySummary(study_dir, plan, validation, files, steps, store.location)
        summary.seal = ledger.append_end(time_utc=utc_now(), exit_code=summary.exit_code)
    return summary


def _write_files(
    plan: Plan,
    study_dir: Path,
    items: dict[str, list[_Item]],
    baseline: dict[str, ImageResult],
    moved: dict[str, dict[str, dict[str, ImageResult]]],
    robust_items: list[_Item],
    validation: dict[str, Any],
    verdicts: dict[str, str],
) -> list[str]:
    """Every file of the study folder but the report and SHA256SUMS; their names."""
    files = [PLAN_FILE, RECIPE_FILE]
    write_bytes(study_dir / PLAN_FILE, plan.raw)
    write_bytes(study_dir / RECIPE_FILE, plan.recipe.raw)
    for part, design in (("precision", plan.precision), ("trueness", plan.trueness)):
        if design is not None and design.table is not None:
            name = design_path(part)
            (study_dir / name).parent.mkdir(exist_ok=True)
            write_bytes(study_dir / name, design.table)
            files.append(name)
    if plan.robustness is not None:
        for move in plan.robustness.moves:
            for direction in DIRECTIONS:
                name = variant_path(move.parameter, direction)
                (study_dir / name).parent.mkdir(exist_ok=True)
                write_bytes(study_dir / name, move.variant(direction).recipe.raw)
                files.append(name)
    write_bytes(study_dir / MEASUREMENTS_FILE, _measurements_csv(plan, items, baseline, verdicts))
    files.append(MEASUREMENTS_FILE)
    if plan.robustness is not None:
        write_bytes(
            study_dir / ROBUSTNESS_FILE, _robustness_csv(plan, robust_items, baseline, moved)
        )
        files.append(ROBUSTNESS_FILE)
    write_bytes(study_dir / VALIDATION_FILE, _json(validation))
    files.append(VALIDATION_FILE)
    return files
