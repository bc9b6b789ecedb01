"""Write docs/reliability.md from the test suite itself.

Usage: ``python tests/reliability_table.py`` (from the repository root) prints the
document; ``python tests/reliability_table.py --write`` writes it to
``docs/reliability.md``. It lists ``tests/bad_inputs/`` and collects the tests of
the bad-recipe, bad-image, fuzz, fault and security files (pytest's collection,
nothing is run), so every number in the table is a count of test cases.
``tests/test_reliability_table.py`` fails when ``docs/reliability.md`` and this
output differ: after adding or removing such a test, run this script with
``--write``.

Every collected fault and security test must belong to a row below; a new test
function that does not is an error here, so that it is classified on purpose.
"""

from __future__ import annotations

import contextlib
import io
import json
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
BAD = TESTS / "bad_inputs"
#: the generated document, relative to the repository root
DOCUMENT = Path("docs") / "reliability.md"
FILES = (
    "test_bad_recipes.py",
    "test_bad_images.py",
    "test_fuzz_recipes.py",
    "test_faults.py",
    "test_security.py",
    "test_hardening.py",
    "test_interrupts.py",
)

#: (row, outcome, test functions); rows appear in this order
FAULT_ROWS = [
    (
        "faults: process killed (SIGKILL)",
        "only whole cache entries and run files are left (temporary files are never read); the run "
        "folder verifies `unfinished` (exit 4), or `intact` when killed after its last ledger line; "
        "the next run completes, reuses every cached result and gives the same files",
        ("test_a_run_killed_at_an_io_point", "test_a_run_with_workers_killed_from_outside"),
    ),
    (
        "faults: damaged cache entries",
        "flipped bit, truncated, another entry's bytes, empty: each reported (`cache entry PATH: ...; "
        "recomputing`), recomputed and stored whole again; the run is identical and `intact`",
        ("test_damaged_cache_entries_are_found_and_recomputed",),
    ),
    (
        "faults: full disk (ENOSPC) under the run folder",
        "`error: PATH: cannot write ... (No space left on device)`, exit 3, no seal printed, the run "
        "folder verifies `unfinished`, never `intact`",
        ("test_a_full_disk_under_the_run_folder_is_a_clear_error",),
    ),
    (
        "faults: full disk (ENOSPC) under the cache",
        "one note (`cannot store results`); the results are computed and recorded, the run is whole "
        "and `intact`",
        ("test_a_full_disk_under_the_cache_is_a_note_and_the_run_is_whole",),
    ),
    (
        "faults: two runs at once, one cache and one output folder",
        "both complete with the same results in distinct run folders, both `intact`",
        ("test_two_runs_at_once_on_one_cache_and_one_output_folder",),
    ),
]
SECURITY_ROWS = [
    (
        "security: YAML object tags",
        "`!!python/...` tags refused at their position (exit 2), never constructed; the loader is a "
        "`SafeLoader` without Python constructors",
        (
            "test_python_tags_are_refused_and_never_constructed",
            "test_the_recipe_loader_is_a_safe_loader_without_python_constructors",
        ),
    ),
    (
        "security: nothing evaluated",
        "expressions in limits, bounds, options and lengths are errors (exit 2), never run; no "
        "`eval`/`exec`/`compile`/`__import__`, pickle, unsafe YAML load or `shell=` in lotproof's code",
        (
            "test_no_code_of_lotproof_evaluates_text_or_unpickles",
            "test_nothing_in_a_recipe_is_evaluated",
        ),
    ),
    (
        "security: the lot's boundary",
        "globs with `..` or absolute paths are recipe errors (exit 2); wildcards never match `..`; a "
        "symbolic link out of the lot makes that image `incomplete` (exit 3), its bytes unread",
        (
            "test_globs_that_leave_the_lot_are_recipe_errors",
            "test_globs_that_look_outward_find_nothing_outside",
            "test_symbolic_links_out_of_the_lot_are_refused_per_image",
        ),
    ),
    (
        "security: names",
        "run folders are one sanitised name directly under `--out`; image names become safe file "
        "names inside the run folder",
        (
            "test_run_folder_names_are_sanitised",
            "test_lot_files_with_odd_names_stay_inside_the_run_folder",
        ),
    ),
    (
        "security: the lot is read-only to lotproof",
        "names, modes, times and bytes of the lot unchanged by runs; every open of a lot file is "
        "`O_RDONLY` (audit hook); `--out` or `--cache` inside the lot is refused (exit 2)",
        (
            "test_a_run_leaves_the_lot_exactly_as_it_was",
            "test_output_or_cache_inside_the_lot_is_refused",
            "test_lot_files_are_opened_read_only_and_never_changed",
        ),
    ),
    (
        "security: bounded loads",
        "recipes over 1,000,000 bytes, inputs over 2 GiB (checked before reading) and cache headers "
        "over 16 MiB are refused; declared array sizes are checked before allocation",
        (
            "test_a_recipe_over_the_size_bound_is_refused_before_parsing",
            "test_a_recipe_that_is_a_pipe_is_bounded",
            "test_an_input_over_the_size_bound_is_refused_before_it_is_read",
            "test_a_sparse_input_of_more_than_2_GiB_is_refused_without_reading_it",
            "test_cache_headers_and_declared_sizes_are_bounded",
        ),
    ),
]

HARDENING_ROWS = [
    (
        "hostile: a recipe's git repository",
        "`core.fsmonitor`, filter, textconv, pager and hooks set in the repository's config: none "
        "runs; only object-reading git plumbing is used and `modified` is decided by hashing the "
        "recipe as a blob",
        (
            "test_git_runs_nothing_a_repository_configures",
            "test_modified_compares_the_bytes_with_the_committed_blob",
        ),
    ),
    (
        "hostile: recipe content that once crashed a run",
        "a revision beyond canonical JSON's integers and more than 400 steps are recipe errors "
        "(exit 2) at their position; the longest chain allowed runs; globs with `~`, control "
        "characters or nothing are refused",
        (
            "test_a_revision_beyond_canonical_json_is_a_recipe_error",
            "test_more_steps_than_the_bound_is_a_recipe_error",
            "test_the_longest_chain_allowed_runs",
            "test_globs_of_home_folders_and_control_characters_are_refused",
        ),
    ),
    (
        "hostile: the run folder",
        "an added folder, even an empty one, is an alteration (exit 4); `--out` or `--cache` inside "
        "a sealed run folder is refused (exit 2) and the run stays `intact`",
        (
            "test_an_empty_folder_added_to_a_run_is_an_alteration",
            "test_output_or_cache_inside_a_sealed_run_is_refused",
        ),
    ),
    (
        "hostile: the ledger's last line",
        "editing the `run-end` event (exit code 1 -> 0) makes the run `altered` without a key: "
        "`ledger.sha256` (checkable with `sha256sum -c`) covers the whole ledger; a finished run "
        "without it is `altered`, a run stopped before run-end `unfinished`; `export` refuses an "
        "altered record (exit 4)",
        (
            "test_the_ledgers_last_line_is_covered_without_a_key",
            "test_a_finished_run_without_its_ledger_sum_is_altered",
            "test_a_run_stopped_between_the_ledger_sum_and_run_end_is_unfinished",
        ),
    ),
    (
        "hostile: pipes where files belong",
        "a FIFO named like an image makes that image `incomplete` (`not a regular file`), never "
        "a hang (`-j 1` and `-j 2`); a FIFO as `ledger.jsonl` or `seal.sig` makes `verify` end "
        "with exit 4",
        (
            "test_a_pipe_named_like_an_image_is_refused_not_waited_on",
            "test_verify_refuses_a_pipe_in_the_run_folder",
        ),
    ),
    (
        "hostile: image names that clash",
        "`a b.tif`, `a_b.tif` and `A_B.tif` in one lot: each gets its own folder and figures "
        "(the safe name and 8 hex digits of the sha256 of its id), recorded in the ledger's "
        "`image` events; the run is whole and `intact`",
        ("test_images_whose_safe_names_clash_get_unique_recorded_names",),
    ),
    (
        "hostile: steps that would do nothing",
        "a footprint of one pixel (`radius: 0.1 um` at 0.65 um per pixel) is a recipe error at "
        "`check` and `run` (exit 2) when the pixel size is known, and makes every image "
        "`incomplete` when it comes from the image; an automatic threshold on a flattened "
        "(constant) intermediate says `no contrast`, never an empty mask that passes",
        (
            "test_a_sub_pixel_footprint_is_a_recipe_error_when_the_pixel_size_is_known",
            "test_a_sub_pixel_footprint_makes_each_image_incomplete_when_sizes_come_from_the_image",
            "test_a_flattened_intermediate_is_no_contrast_never_an_empty_pass",
        ),
    ),
    (
        "hostile: the cache",
        "an entry whose header names a false checksum never reaches `steps.csv` or the ledger; an "
        "entry larger than a result of the image can be is refused before it is read; a pipe in "
        "place of an entry is damage, not a hang (`-j 1` and `-j 2`); a `--cache` folder holding "
        "other files is refused (exit 2)",
        (
            "test_a_cache_entry_whose_header_lies_never_reaches_the_record",
            "test_a_cache_entry_larger_than_a_result_can_be_is_never_read",
            "test_a_pipe_in_place_of_a_cache_entry_is_damage_not_a_hang",
            "test_a_foreign_folder_is_never_taken_as_the_cache",
        ),
    ),
]

INTERRUPT_ROWS = [
    (
        "interrupts: Ctrl-C at random moments of a `--jobs 2` run",
        "12 seeded moments, from start-up to the output stage: the command ends within seconds "
        "(exit 130, or killed by the signal while Python shuts down after a finished run), no "
        "traceback, no process of the run left, the run folder `unfinished` (or `intact` when "
        "the signal came after the seal), never `altered`",
        ("test_ctrl_c_at_random_moments_always_ends_the_run",),
    ),
]


@dataclass
class _Item:
    file: str
    function: str
    nodeid: str
    xfail: str | None
    max_examples: int | None


@dataclass
class _Collector:
    items: list[_Item] = field(default_factory=list)

    def pytest_collection_modifyitems(self, items: list[Any]) -> None:
        for item in items:
            marker = item.get_closest_marker("xfail")
            function = getattr(item, "function", None)
            # hypothesis keeps a test's settings on the function it wraps
            chosen = getattr(function, "_hypothesis_internal_use_settings", None)
            self.items.append(
                _Item(
                    file=Path(str(item.fspath)).name,
                    function=item.originalname,
                    nodeid=item.nodeid,
                    xfail=marker.kwargs.get("reason", "") if marker is not None else None,
                    max_examples=chosen.max_examples
                    if chosen is not None and hasattr(function, "hypothesis")
                    else None,
                )
            )


def collect() -> list[_Item]:
    """The tests of :data:`FILES`, collected (not run) by pytest."""
    collector = _Collector()
    paths = [str(TESTS / name) for name in FILES if (TESTS / name).exists()]
    with contextlib.redirect_stdout(io.StringIO()) as shown:
        code = pytest.main(
            ["--collect-only", "-q", "-p", "no:cacheprovider", "--rootdir", str(ROOT), *paths],
            plugins=[collector],
        )
    if code != 0:
        raise SystemExit(f"collection failed (pytest exit {code}):\n{shown.getvalue()}")
    return collector.items


def _plural(n: int, word: str) -> str:
    if n == 1:
        return f"{n} {word}"
    return f"{n} {word[:-1]}ies" if word.endswith("y") else f"{n} {word}s"


def _known(items: list[_Item]) -> str:
    n = sum(1 for i in items if i.xfail is not None)
    return f" ({_plural(n, 'known defect')}, strict xfail)" if n else ""


def _rows_for(
    items: list[_Item], rows: list[tuple[str, str, tuple[str, ...]]], file: str
) -> list[str]:
    mine = [i for i in items if i.file == file]
    claimed = {name for _, _, names in rows for name in names}
    unclaimed = sorted({i.function for i in mine} - claimed)
    if unclaimed:
        raise SystemExit(
            f"{file}: tests in no row of tests/reliability_table.py: {', '.join(unclaimed)}"
        )
    lines = []
    for title, outcome, names in rows:
        cases = [i for i in mine if i.function in names]
        lines.append(f"| {title} | {len(cases)} | {outcome}{_known(cases)} |")
    return lines


def _bad_recipes(items: list[_Item]) -> list[str]:
    files = sorted((BAD / "recipes").glob("*.yaml"))
    sidecar = json.loads((BAD / "recipes" / "EXPECTED.json").read_text(encoding="utf-8"))
    wrong = sum(1 for entry in sidecar.values() if "xfail" in entry)
    tests = [i for i in items if i.file == "test_bad_recipes.py"]
    per_file = {i.function for i in tests if i.nodeid.endswith(".yaml]")}
    known = f" ({_plural(wrong, 'message')} known to be imprecise, strict xfail)" if wrong else ""
    misfit = [
        i
        for i in tests
        if i.function == "test_from_image_recipe_on_uncalibrated_images_is_incomplete_never_pass"
    ]
    return [
        f"| bad recipes (`tests/bad_inputs/recipes/`) | {len(files)} files, "
        f"{_plural(len(per_file), 'check')} each | `check` and `run` exit 2 with "
        f"`FILE:LINE:COL: where: what` at the problem, no traceback, nothing written: no run "
        f"folder, no cache, the lot unchanged{known} |",
        f"| a valid recipe that does not fit its lot (`from-image`, uncalibrated images) | "
        f"{len(misfit)} | `check` passes; every image `incomplete` with its reason, exit 3, "
        f"the lot never `pass` |",
    ]


def _bad_images(items: list[_Item]) -> list[str]:
    folder = BAD / "images"
    files = (
        sorted(p for p in folder.iterdir() if p.suffix not in (".py", ".json", ".md"))
        if folder.is_dir()
        else []
    )
    tests = [i for i in items if i.file == "test_bad_images.py"]
    if not files:
        raise SystemExit(f"{folder}: no bad images; run its generator (make_bad_images.py)")
    return [
        f"| bad images (`tests/bad_inputs/images/`, see `tests/test_bad_images.py`) | "
        f"{len(files)} files | that image `incomplete` with "
        f"its reason in `images.csv`, the other images analysed, exit 3, the lot never `pass`{_known(tests)} |"
    ]


def _fuzz(items: list[_Item]) -> list[str]:
    tests = [i for i in items if i.file == "test_fuzz_recipes.py"]
    properties = [i for i in tests if i.max_examples is not None]
    examples = sum(i.max_examples or 0 for i in properties)
    regressions = [i for i in tests if i.max_examples is None]
    return [
        f"| generated recipes (hypothesis: bytes, YAML punctuation, nested documents, mutations "
        f"of a valid recipe) | {_plural(len(properties), 'property')}, up to {examples} examples a "
        f"run, and {len(regressions)} regression cases | `parse_recipe` returns a Recipe or raises "
        f"RecipeError with every position inside the file; never another exception{_known(tests)} |"
    ]


def table(items: list[_Item]) -> str:
    """The whole of ``docs/reliability.md``."""
    lines = [
        "# Reliability",
        "",
        "What the test suite feeds lotproof on purpose, and what must come out. Every number is a",
        "count of test cases. This page is generated: `python tests/reliability_table.py --write`",
        "writes it, and `tests/test_reliability_table.py` fails when it and the tests disagree.",
        "",
        "| class | cases | outcome |",
        "|---|---|---|",
        *_bad_recipes(items),
        *_bad_images(items),
        *_fuzz(items),
        *_rows_for(items, FAULT_ROWS, "test_faults.py"),
        *_rows_for(items, SECURITY_ROWS, "test_security.py"),
        *_rows_for(items, HARDENING_ROWS, "test_hardening.py"),
        *_rows_for(items, INTERRUPT_ROWS, "test_interrupts.py"),
        "",
        "Exit codes in these cases: 2 the recipe or the command line is invalid (nothing ran, nothing",
        "written); 3 an image could not be analysed, or the run folder or its ledger could not be",
        "written (the folder is left `unfinished`); 4 `verify` found a run unfinished or altered.",
    ]
    known = [i for i in items if i.xfail is not None]
    if known:
        lines += ["", "Known defects, each a strict xfail that passes the day it is fixed:", ""]
        seen: set[tuple[str, str]] = set()
        for item in known:
            key = (item.file, item.function)
            if key in seen:
                continue
            seen.add(key)
            n = sum(1 for i in known if (i.file, i.function) == key)
            cases = f" ({n} cases)" if n > 1 else ""
            lines.append(f"- `{item.file}::{item.function}`{cases}: {item.xfail}")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    text = table(collect())
    if sys.argv[1:] == ["--write"]:
        (ROOT / DOCUMENT).write_text(text, encoding="utf-8")
        print(f"wrote {DOCUMENT}")
    elif sys.argv[1:]:
        raise SystemExit("usage: python tests/reliability_table.py [--write]")
    else:
        sys.stdout.write(text)
