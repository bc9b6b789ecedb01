"""Hostile recipes and lots: nothing is constructed, evaluated, read or written where it must not be.

Checks (issue 9, "Security"): YAML is loaded safely; nothing in a recipe is ever
evaluated; input globs and symbolic links cannot reach outside the lot; run folder
names are sanitised; lotproof never writes into the lot and opens its files
read-only; every file it loads is bounded in size.
"""

from __future__ import annotations

import ast
import dataclasses
import hashlib
import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest
import tifffile
import yaml

import lotproof.runner.evaluate.inputs as inputs_module
from lotproof.runner.cli.main import main
from lotproof.runner.errors import (
    EXIT_BAD_INPUT,
    EXIT_INVALID,
    EXIT_LIMIT_FAILED,
    EXIT_OK,
    InputError,
    RecipeError,
)
from lotproof.runner.evaluate.cache import _MAX_HEADER, DiskStore
from lotproof.runner.evaluate.inputs import MAX_FILE_BYTES, read_image
from lotproof.runner.recipe.load import load_recipe, parse_recipe
from lotproof.runner.recipe.yamlpos import MAX_RECIPE_BYTES, _StrictLoader
from lotproof.runner.record.folder import create_run_folder
from lotproof.runner.record.layout import image_folder
from lotproof.runner.record.verify import verify_run

from _builders import recipe_text, write_lot, write_recipe

ROOT = Path(__file__).resolve().parents[1]

#: Otsu threshold (mask kept) and measure
RECIPE = recipe_text("security-test", method="otsu", keep=True, connectivity=None)


def _image(seed: int) -> np.ndarray:
    # kept here: no other module draws this image (seeded noise under one fixed bright block)
    rng = np.random.default_rng(seed)
    image = rng.integers(0, 50, (48, 48)).astype(np.uint8)
    image[10:20, 12:24] = 220
    return image


def _lot(tmp_path: Path, names: tuple[str, ...] = ("a.tif", "b.tif")) -> Path:
    return write_lot(tmp_path, {name: _image(i) for i, name in enumerate(names)})


def _exit(argv: list[str]) -> int | str | None:
    with pytest.raises(SystemExit) as ended:
        main(argv)
    return ended.value.code


def _tree(folder: Path) -> dict[str, tuple[int, int, str]]:
    """Every entry under ``folder``: mode, mtime and content (or link target) digest."""
    found = {}
    for path in sorted(folder.rglob("*")):
        info = path.lstat()
        if path.is_symlink():
            digest = "-> " + os.readlink(path)
        elif path.is_file():
            digest = hashlib.sha256(path.read_bytes()).hexdigest()
        else:
            digest = "folder"
        found[path.relative_to(folder).as_posix()] = (info.st_mode, info.st_mtime_ns, digest)
    return found


# ---------------------------------------------------------------- YAML is data, never objects


@pytest.mark.parametrize(
    "tagged",
    [
        "!!python/object/apply:os.mkdir [{canary}]",
        "!!python/object/new:os.mkdir [{canary}]",
        "!!python/name:os.system",
        "!!python/module:os",
        "!!python/object:os.PathLike {{}}",
    ],
)
def test_python_tags_are_refused_and_never_constructed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], tagged: str
) -> None:
    canary = tmp_path / "constructed"
    value = tagged.format(canary=json.dumps(str(canary)))
    path = write_recipe(tmp_path, RECIPE.replace("method: otsu", f"method: {value}"))
    assert _exit(["check", str(path)]) == EXIT_INVALID
    err = capsys.readouterr().err
    assert f"{path}:11:13: explicit tag 'tag:yaml.org,2002:python/" in err, err
    assert not canary.exists()


def test_the_recipe_loader_is_a_safe_loader_without_python_constructors() -> None:
    # source: PyYAML documentation, "yaml.SafeLoader ... only resolves basic YAML tags"
    assert issubclass(_StrictLoader, yaml.SafeLoader)
    assert not issubclass(_StrictLoader, (yaml.FullLoader, yaml.UnsafeLoader))
    constructors = {**_StrictLoader.yaml_constructors, **_StrictLoader.yaml_multi_constructors}
    assert not [tag for tag in constructors if tag and "python" in tag]


_FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__"}
_FORBIDDEN_MODULES = {"pickle", "marshal", "shelve", "dill", "cloudpickle"}
_UNSAFE_YAML = {"load", "load_all", "unsafe_load", "unsafe_load_all", "full_load", "full_load_all"}


def _source_findings() -> list[str]:
    findings = []
    for path in sorted([*(ROOT / "runner").rglob("*.py"), *(ROOT / "steps").rglob("*.py")]):
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        where = path.relative_to(ROOT).as_posix()
        for node in ast.walk(tree):
            if isinstance(node, ast.Call):
                func = node.func
                if isinstance(func, ast.Name) and func.id in _FORBIDDEN_CALLS:
                    findings.append(f"{where}:{node.lineno}: {func.id}()")
                if (
                    isinstance(func, ast.Attribute)
                    and func.attr in _UNSAFE_YAML
                    and isinstance(func.value, ast.Name)
                    and func.value.id == "yaml"
                ):
                    findings.append(f"{where}:{node.lineno}: yaml.{func.attr}()")
                for keyword in node.keywords:
                    if keyword.arg == "shell" and not (
                        isinstance(keyword.value, ast.Constant) and keyword.value.value is False
                    ):
                        findings.append(f"{where}:{node.lineno}: shell=")
            elif isinstance(node, (ast.Import, ast.ImportFrom)):
                names = (
                    [a.name for a in node.names]
                    if isinstance(node, ast.Import)
                    else [node.module or ""]
                )
                for name in names:
                    if name.split(".")[0] in _FORBIDDEN_MODULES:
                        findings.append(f"{where}:{node.lineno}: import {name}")
    return findings


def test_no_code_of_lotproof_evaluates_text_or_unpickles() -> None:
    # common practice, no source: the only safe evaluator is none at all
    assert _source_findings() == []


@pytest.mark.parametrize(
    ("old", "new", "line", "message"),
    [
        (
            "value: stats.area_fraction",
            "value: __import__('os').mkdir({canary})",
            18,
            "must name a step's value as STEP.NAME",
        ),
        ("max: 0.5", "max: \"__import__('os').mkdir({canary})\"", 19, "cannot read"),
        ("max: 0.5", "max: 1 + 1", 19, "write the bound without a unit (got '1 + 1')"),
        ("max: 0.5", 'max: "{{0.5}}"', 19, "cannot read"),
        ("method: otsu", "method: \"__import__('os').mkdir({canary})\"", 11, "is not one of"),
        (
            "pixel_size: 0.5 um",
            "pixel_size: \"__import__('os').mkdir({canary}) um\"",
            4,
            "cannot read",
        ),
    ],
    ids=[
        "limit-value",
        "limit-bound",
        "bound-arithmetic",
        "bound-template",
        "step-option",
        "pixel-size",
    ],
)
def test_nothing_in_a_recipe_is_evaluated(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], old: str, new: str, line: int, message: str
) -> None:
    canary = tmp_path / "evaluated"
    edited = RECIPE.replace(old, new.format(canary=json.dumps(str(canary)).replace('"', "'")))
    assert edited != RECIPE
    path = write_recipe(tmp_path, edited)
    lot = _lot(tmp_path)
    assert (
        _exit(["run", str(path), str(lot), "--out", str(tmp_path / "runs"), "--no-cache"])
        == EXIT_INVALID
    )
    err = capsys.readouterr().err
    assert any(row.startswith(f"{path}:{line}:") and message in row for row in err.splitlines()), (
        err
    )
    assert not canary.exists() and not (tmp_path / "runs").exists()


# ---------------------------------------------------------------- the lot's boundary


@pytest.mark.parametrize(
    "pattern",
    [
        "../*.tif",
        "../lot/*.tif",
        "sub/../../*.tif",
        "..\\\\*.tif",
        "/etc/*",
        "C:/lots/*.tif",
        "**/../../*.tif",
    ],
)
def test_globs_that_leave_the_lot_are_recipe_errors(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], pattern: str
) -> None:
    path = write_recipe(tmp_path, RECIPE.replace('"*.tif"', f'"{pattern}"'))
    lot = _lot(tmp_path)
    assert _exit(["check", str(path)]) == EXIT_INVALID
    assert f"{path}:6:12: inputs.section: an input glob" in capsys.readouterr().err
    assert (
        _exit(["run", str(path), str(lot), "--out", str(tmp_path / "runs"), "--no-cache"])
        == EXIT_INVALID
    )
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize("pattern", ["[.][.]/*.tif", ".*/*.tif", "*/[.][.]/*.tif"])
def test_globs_that_look_outward_find_nothing_outside(tmp_path: Path, pattern: str) -> None:
    # A wildcard never matches '.' or '..' (source: Python docs, pathlib.Path.glob and
    # os.scandir list neither). A glob starting with '~' is refused outright
    # (tests/test_hardening.py).
    lot = _lot(tmp_path, ("a.tif", "sub/b.tif"))
    tifffile.imwrite(tmp_path / "outside.tif", _image(9))
    for sample in inputs_module.find_samples(lot, {"section": pattern}):
        for file in sample.files.values():
            assert file.resolve().is_relative_to(lot.resolve()), file


def test_symbolic_links_out_of_the_lot_are_refused_per_image(tmp_path: Path) -> None:
    lot = _lot(tmp_path, ("a.tif", "inner/c.tif"))
    outside = tmp_path / "outside"
    outside.mkdir()
    tifffile.imwrite(outside / "x.tif", _image(7))
    (lot / "link.tif").symlink_to(outside / "x.tif")  # a file outside
    (lot / "inner" / "up").symlink_to(outside)  # a folder outside
    (lot / "inside.tif").symlink_to(lot / "a.tif")  # inside the lot: allowed
    recipe = write_recipe(
        tmp_path, RECIPE.replace('"*.tif"', '"**/*.tif"').replace("keep: true", "keep: false")
    )
    out = tmp_path / "runs"
    assert (
        _exit(["run", str(recipe), str(lot), "--out", str(out), "--no-cache", "-j", "1"])
        == EXIT_BAD_INPUT
    )
    (run,) = [p for p in out.iterdir() if p.is_dir()]
    verdicts = json.loads((run / "verdicts.json").read_text())
    assert verdicts["lot_verdict"] != "pass"
    statuses = verdicts["image_verdicts"]
    refused = verdicts["incomplete_images"]
    assert set(refused) == {"link.tif"} | (
        {"inner/up/x.tif"} if "inner/up/x.tif" in statuses else set()
    )
    for reason in refused.values():
        assert "points outside the lot folder" in reason
    assert statuses["a.tif"] != "incomplete" and statuses["inside.tif"] != "incomplete"
    recorded = json.loads((run / "inputs.json").read_text())
    outside_digest = hashlib.sha256((outside / "x.tif").read_bytes()).hexdigest()
    assert outside_digest not in json.dumps(recorded)  # its bytes were never read
    # the folder link, named directly by a glob
    direct = write_recipe(tmp_path, RECIPE.replace('"*.tif"', '"inner/up/*.tif"'))
    assert (
        _exit(["run", str(direct), str(lot), "--out", str(out), "--no-cache", "-j", "1"])
        == EXIT_BAD_INPUT
    )
    newest = max(p for p in out.iterdir() if p.is_dir())
    reasons = json.loads((newest / "verdicts.json").read_text())["incomplete_images"]
    assert (
        list(reasons) == ["inner/up/x.tif"]
        and "points outside the lot folder" in reasons["inner/up/x.tif"]
    )


def test_run_folder_names_are_sanitised(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_recipe(tmp_path, RECIPE.replace("name: security-test", "name: ../../escape"))
    assert _exit(["check", str(path)]) == EXIT_INVALID
    assert "must be a slug" in capsys.readouterr().err
    # even a name that never passed the schema stays one folder directly under --out
    loaded = load_recipe(write_recipe(tmp_path, RECIPE))
    recipe = dataclasses.replace(loaded, name="../../x /y\\z\n")
    out = tmp_path / "runs"
    run = create_run_folder(out, recipe)
    assert run.parent == out and run.resolve().parent == out.resolve()
    assert all(c.isalnum() or c in "._-" for c in run.name), run.name
    # image ids become file names below kept/ and figures/ without leaving them
    for image_id in ("../../etc/passwd", "a/../../b.tif", "/abs.tif", "we ird;$(x).tif", ".."):
        name = image_folder(image_id)
        assert ".." not in name.split("/") and not name.startswith("/"), name
        assert all(c.isalnum() or c in "._-/" for c in name), name


def test_lot_files_with_odd_names_stay_inside_the_run_folder(tmp_path: Path) -> None:
    lot = _lot(tmp_path, ("we ird;$(touch x).tif", "sub dir/..b.tif"))
    recipe = write_recipe(tmp_path, RECIPE)
    out = tmp_path / "runs"
    argv = ["run", str(recipe), str(lot), "--out", str(out), "--no-cache", "-j", "1"]
    assert _exit(argv) in (EXIT_OK, EXIT_LIMIT_FAILED)
    (run,) = [p for p in out.iterdir() if p.is_dir()]
    for path in run.rglob("*"):
        assert path.resolve().is_relative_to(run.resolve())
        assert all(c.isalnum() or c in "._-" for c in path.name), path
    assert verify_run(run).status == "intact"
    assert not (tmp_path / "x").exists() and not Path("x").exists()


# ---------------------------------------------------------------- never writing into the lot


def test_a_run_leaves_the_lot_exactly_as_it_was(tmp_path: Path) -> None:
    lot = _lot(tmp_path, ("a.tif", "b.tif", "deeper/c.tif"))
    (lot / "notes.txt").write_text("not an input\n")
    recipe = write_recipe(tmp_path, RECIPE.replace('"*.tif"', '"**/*.tif"'))
    before = _tree(lot)
    for jobs in ("1", "2"):
        code = _exit(
            [
                "run",
                str(recipe),
                str(lot),
                "--out",
                str(tmp_path / "runs"),
                "--cache",
                str(tmp_path / "cache"),
                "-j",
                jobs,
            ]
        )
        assert code in (EXIT_OK, EXIT_LIMIT_FAILED)
    assert _tree(lot) == before  # names, modes, modification times and bytes


@pytest.mark.parametrize("inside", ["out", "cache"])
def test_output_or_cache_inside_the_lot_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], inside: str
) -> None:
    lot = _lot(tmp_path)
    before = _tree(lot)
    out = lot / "runs" if inside == "out" else tmp_path / "runs"
    cache = lot / ".cache" if inside == "cache" else tmp_path / "cache"
    recipe = write_recipe(tmp_path, RECIPE)
    code = _exit(["run", str(recipe), str(lot), "--out", str(out), "--cache", str(cache)])
    assert code == EXIT_INVALID
    err = capsys.readouterr().err
    assert "lies inside the lot folder" in err and "Traceback" not in err
    assert _tree(lot) == before
    assert not (tmp_path / "runs").exists()


_AUDITED_RUN = """
import json, os, sys
lot = os.path.realpath(sys.argv[1])
seen = []
def inside(arg):
    if not isinstance(arg, (str, bytes, os.PathLike)):
        return False
    text = os.fsdecode(arg)
    return "\\0" not in text and os.path.realpath(text).startswith(lot)
def hook(event, args):
    if any(inside(a) for a in args):
        seen.append([event, [a if isinstance(a, (int, type(None))) else os.fsdecode(a) if isinstance(a, (str, bytes, os.PathLike)) else repr(a) for a in args]])
sys.addaudithook(hook)
from lotproof.runner.cli.main import main
try:
    main(sys.argv[2:])
finally:
    print(json.dumps(seen))
"""

#: audit events (source: Python docs, "Audit events table") that change a file or folder
_CHANGING = {
    "os.chmod",
    "os.chown",
    "os.chflags",
    "os.link",
    "os.mkdir",
    "os.remove",
    "os.rename",
    "os.rmdir",
    "os.symlink",
    "os.truncate",
    "os.utime",
    "os.removexattr",
    "os.setxattr",
    "shutil.chown",
    "shutil.copyfile",
    "shutil.copymode",
    "shutil.copystat",
    "shutil.copytree",
    "shutil.move",
    "shutil.rmtree",
    "tempfile.mkstemp",
    "tempfile.mkdtemp",
}


def test_lot_files_are_opened_read_only_and_never_changed(tmp_path: Path) -> None:
    # Every file operation of a real run, seen by a Python audit hook (PEP 578).
    lot = _lot(tmp_path)
    argv = [
        "run",
        str(write_recipe(tmp_path, RECIPE)),
        str(lot),
        "--out",
        str(tmp_path / "runs"),
        "--cache",
        str(tmp_path / "cache"),
        "-j",
        "1",
        "-q",
    ]
    done = subprocess.run(
        [sys.executable, "-c", _AUDITED_RUN, str(lot), *argv],
        capture_output=True,
        timeout=120,
        check=False,
    )
    assert done.returncode in (EXIT_OK, EXIT_LIMIT_FAILED), done.stderr.decode()
    events = json.loads(done.stdout.decode().splitlines()[-1])
    opened = [args for event, args in events if event == "open"]
    assert sorted({Path(args[0]).name for args in opened}) == ["a.tif", "b.tif"]
    write_flags = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_APPEND
    for path, mode, flags in opened:
        assert flags & write_flags == 0, (path, mode, flags)  # O_RDONLY
        assert mode is None or set(mode) <= set("rb"), (path, mode)
    assert [e for e, _ in events if e in _CHANGING] == []


# ---------------------------------------------------------------- bounded loads


def test_a_recipe_over_the_size_bound_is_refused_before_parsing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    at_bound = RECIPE + "#" * (MAX_RECIPE_BYTES - len(RECIPE) - 1) + "\n"
    assert len(at_bound.encode()) == MAX_RECIPE_BYTES == 1_000_000
    ok = write_recipe(tmp_path, at_bound)
    assert _exit(["check", str(ok)]) == EXIT_OK
    over = tmp_path / "over.yaml"
    over.write_text(at_bound + "#")
    assert _exit(["check", str(over)]) == EXIT_INVALID
    assert (
        f"{over}:1:1: the file is 1000001 bytes; a recipe is at most 1000000 bytes"
        in capsys.readouterr().err
    )
    with pytest.raises(RecipeError):
        parse_recipe(b"[" * 10_000_000)  # too deep long before it is too big: no crash either


def test_a_recipe_that_is_a_pipe_is_bounded(tmp_path: Path) -> None:
    fifo = tmp_path / "recipe.yaml"
    os.mkfifo(fifo)
    stop = threading.Event()
    chunk = b"#" * 65536 + b"\n"

    def writer() -> None:
        fd = None
        while fd is None and not stop.is_set():
            try:
                fd = os.open(fifo, os.O_WRONLY | os.O_NONBLOCK)
            except OSError:
                stop.wait(0.01)  # no reader yet
        if fd is None:
            return
        os.set_blocking(fd, True)
        try:
            for _ in range(2 * MAX_RECIPE_BYTES // len(chunk) + 1):
                os.write(fd, chunk)
        except BrokenPipeError:
            pass  # the reader stopped at the bound
        finally:
            os.close(fd)

    thread = threading.Thread(target=writer, daemon=True)
    thread.start()
    try:
        with pytest.raises(RecipeError) as err:
            load_recipe(fifo)
    finally:
        stop.set()
        thread.join(timeout=30)
    assert "at most 1000000 bytes" in str(err.value) or "not a regular file" in str(err.value)


def test_an_input_over_the_size_bound_is_refused_before_it_is_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    assert MAX_FILE_BYTES == 2 * 1024**3  # the documented bound
    lot = _lot(tmp_path, ("a.tif",))
    size = (lot / "a.tif").stat().st_size
    monkeypatch.setattr(inputs_module, "MAX_FILE_BYTES", size - 1)
    reads: list[int] = []
    real_read = os.read
    monkeypatch.setattr(os, "read", lambda fd, n: reads.append(n) or real_read(fd, n))
    with pytest.raises(InputError, match=f"{size} bytes is more than the {size - 1} bytes"):
        read_image(lot / "a.tif", lot)
    assert reads == []
    monkeypatch.setattr(inputs_module, "MAX_FILE_BYTES", size)
    assert read_image(lot / "a.tif", lot).size == size


def test_a_sparse_input_of_more_than_2_GiB_is_refused_without_reading_it(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    huge = lot / "huge.tif"
    with open(huge, "wb") as handle:
        handle.write(b"II*\x00")
        handle.truncate(MAX_FILE_BYTES + 1)  # sparse: no disk space, no read
    with pytest.raises(InputError, match="more than the 2147483648 bytes"):
        read_image(huge, lot)


def test_cache_headers_and_declared_sizes_are_bounded(tmp_path: Path) -> None:
    store = DiskStore(tmp_path / "cache")
    key = "c" * 64
    store.put(key, np.zeros((4, 4), np.uint8))
    path = store.path(key)
    path.write_bytes(b"{" + b" " * _MAX_HEADER)  # no newline within the bound
    assert store.checksum(key) is None
    assert store.get(key) is None
    assert any("no header" in m for m in store.drain_messages())
    # a header that declares a huge array is refused before anything is allocated
    header = {
        "format": "lotproof-cache/1",
        "key": key,
        "checksum": "0" * 64,
        "result": {"array": {"dtype": "|u1", "shape": [10**7, 10**7], "nbytes": 10**14}},
    }
    path.write_bytes(json.dumps(header).encode() + b"\n" + b"\x00" * 16)
    store = DiskStore(tmp_path / "cache")  # a damaged key is reported once per store
    assert store.get(key) is None
    assert any("its header declares" in m for m in store.drain_messages())
