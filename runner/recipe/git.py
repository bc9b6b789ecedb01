"""Where a recipe sits in git: its commit, and a recipe at a past revision.

Every call runs ``git`` without a shell, without optional locks, without a
terminal prompt and in the C locale; a git that cannot be run is "not in git".
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path
from typing import Any

__all__ = ["GitError", "git_info", "git_show", "run_git"]


class GitError(ValueError):
    """git could not give what was asked; the message says why, in git's words where it gave any."""


def _git(folder: Path, *args: str) -> subprocess.CompletedProcess[bytes]:
    return subprocess.run(
        ["git", "--no-optional-locks", "-C", str(folder), *args],
        capture_output=True,
        timeout=30,
        check=False,
        env={**os.environ, "LC_ALL": "C", "GIT_TERMINAL_PROMPT": "0"},
        stdin=subprocess.DEVNULL,
    )


def run_git(folder: Path, *args: str) -> str | None:
    """``git -C folder ARGS``'s standard output, or None when git fails or cannot be run."""
    try:
        done = _git(folder, *args)
    except (OSError, subprocess.SubprocessError):
        return None
    if done.returncode != 0:
        return None
    return done.stdout.decode("utf-8", errors="replace")


def git_show(path: str, rev: str) -> bytes:
    """The bytes of the file ``path`` at git revision ``rev`` of the work tree it sits in.

    Raises
    ------
    GitError
        When the folder is not in a git work tree, the file lies outside it, ``rev``
        is not a revision, or ``git show`` fails.
    """
    folder = Path(os.path.abspath(path)).parent
    if not folder.is_dir():
        raise GitError(f"no folder {folder} to find the git repository in")
    try:
        top = _git(folder, "rev-parse", "--show-toplevel")
        if top.returncode != 0:
            raise GitError(f"{folder} is not inside a git work tree")
        root = Path(top.stdout.decode().strip()).resolve()
        try:
            relative = (folder.resolve() / Path(path).name).relative_to(root).as_posix()
        except ValueError:
            raise GitError(f"{path} is not inside the repository {root}") from None
        if rev.startswith("-"):
            raise GitError(f"{rev!r} is not a git revision")
        done = _git(folder, "show", f"{rev}:{relative}")
    except (OSError, subprocess.SubprocessError) as err:
        raise GitError(f"cannot run git ({err})") from None
    if done.returncode != 0:
        message = done.stderr.decode("utf-8", errors="replace").strip().splitlines()
        raise GitError(f"git show {rev}:{relative} failed: {message[-1] if message else '?'}")
    return done.stdout


def git_info(path: Path) -> dict[str, Any] | None:
    """Where ``path`` (a file) sits in git: ``{commit, path_in_repo, modified}``.

    ``commit`` is the work tree's HEAD (None in a repository without commits),
    ``path_in_repo`` the file's POSIX path from the repository root, ``modified``
    True when the file differs from that commit (changed, staged, untracked or
    ignored). None outside a work tree or when git cannot be run. Runs ``git``
    without a shell and without taking optional locks.
    """
    path = Path(os.path.abspath(path))
    folder = path.parent
    top = run_git(folder, "rev-parse", "--show-toplevel")
    if top is None or not top.strip():
        return None
    top_path = Path(top.strip()).resolve()
    try:
        relative = path.resolve().relative_to(top_path).as_posix()
    except ValueError:
        return None
    head = run_git(folder, "rev-parse", "--verify", "--quiet", "HEAD^{commit}")
    commit = head.strip() if head and head.strip() else None
    if commit is None:
        return {"commit": None, "path_in_repo": relative, "modified": True}
    in_commit = run_git(top_path, "ls-tree", "--name-only", commit, "--", relative)
    status = run_git(
        top_path, "status", "--porcelain=v1", "--untracked-files=all", "--ignored", "--", relative
    )
    if in_commit is None or status is None:
        return None
    modified = not in_commit.strip() or bool(status.strip())
    return {"commit": commit, "path_in_repo": relative, "modified": modified}
