"""Hostile inputs of the second round: each case was once a hang, a silent pass or a crash."""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest

from lotproof.runner.recipe.git import git_info, git_show


def _git(repo: Path, *args: str) -> None:
    subprocess.run(["git", "-C", str(repo), *args], check=True, capture_output=True)


@pytest.fixture
def hostile_repo(tmp_path: Path) -> tuple[Path, Path]:
    """A repository whose own configuration names commands: fsmonitor, a filter, textconv, hooks.

    Every such command would leave a canary file in ``canaries/``.
    """
    repo, canaries = tmp_path / "repo", tmp_path / "canaries"
    repo.mkdir()
    canaries.mkdir()
    _git(repo, "init", "-q")
    _git(repo, "config", "user.email", "lab@example.invalid")
    _git(repo, "config", "user.name", "lab")
    recipe = repo / "recipe.yaml"
    recipe.write_text("format: lotproof/1\n", encoding="utf-8")
    (repo / ".gitattributes").write_text("*.yaml filter=trap diff=trap\n", encoding="utf-8")
    _git(repo, "add", ".")
    _git(repo, "commit", "-q", "-m", "recipe")
    script = tmp_path / "trap.sh"
    script.write_text(f'#!/bin/sh\ntouch "{canaries}/$1"\ncat\n', encoding="utf-8")
    script.chmod(0o755)
    hooks = repo / ".git" / "hooks"
    for hook in ("post-checkout", "pre-commit", "post-index-change", "reference-transaction"):
        (hooks / hook).write_text(f'#!/bin/sh\ntouch "{canaries}/hook-{hook}"\n', encoding="utf-8")
        (hooks / hook).chmod(0o755)
    for key, value in (
        ("core.fsmonitor", f"{script} fsmonitor"),
        ("filter.trap.clean", f"{script} clean"),
        ("filter.trap.smudge", f"{script} smudge"),
        ("diff.trap.textconv", f"{script} textconv"),
        ("core.pager", f"{script} pager"),
        ("diff.external", f"{script} external"),
    ):
        _git(repo, "config", key, value)
    recipe.write_text("format: lotproof/1\n# edited\n", encoding="utf-8")
    return recipe, canaries


def test_git_runs_nothing_a_repository_configures(hostile_repo: tuple[Path, Path]) -> None:
    recipe, canaries = hostile_repo
    # The same repository makes plain `git status` run its commands: the trap is real.
    subprocess.run(["git", "-C", str(recipe.parent), "status"], capture_output=True, check=True)
    assert "fsmonitor" in {p.name for p in canaries.iterdir()}
    for canary in canaries.iterdir():
        canary.unlink()

    info = git_info(recipe)
    assert info is not None
    assert info["path_in_repo"] == "recipe.yaml"
    assert info["modified"] is True  # edited after the commit
    assert git_show(str(recipe), "HEAD") == b"format: lotproof/1\n"
    assert list(canaries.iterdir()) == []


def test_modified_compares_the_bytes_with_the_committed_blob(tmp_path: Path) -> None:
    repo = tmp_path / "repo"
    repo.mkdir()
    _git(repo, "init", "-q")
    _git(repo, "config", "user.email", "lab@example.invalid")
    _git(repo, "config", "user.name", "lab")
    recipe = repo / "recipe.yaml"
    recipe.write_bytes(b"format: lotproof/1\n")
    _git(repo, "add", ".")
    _git(repo, "commit", "-q", "-m", "recipe")
    head = subprocess.run(
        ["git", "-C", str(repo), "rev-parse", "HEAD"], capture_output=True, check=True, text=True
    ).stdout.strip()
    assert git_info(recipe) == {"commit": head, "path_in_repo": "recipe.yaml", "modified": False}
    recipe.write_bytes(b"format: lotproof/1\n ")
    assert git_info(recipe)["modified"] is True  # type: ignore[index]
    recipe.write_bytes(b"format: lotproof/1\n")
    assert git_info(recipe)["modified"] is False  # type: ignore[index]
    untracked = repo / "other.yaml"
    untracked.write_bytes(b"format: lotproof/1\n")
    assert git_info(untracked)["modified"] is True  # type: ignore[index]
