"""Where a recipe sits in git: its commit, and a recipe at a past revision.

Recipes come from repositories lotproof does not control, and a repository's own
configuration can name commands that git runs (``core.fsmonitor``, filter and
textconv drivers, hooks, a pager). lotproof therefore runs only git plumbing that
reads objects (``rev-parse``, ``ls-tree``, ``cat-file``), never a command that
reads the work tree through the index (``status``, ``diff``): whether the recipe
is modified is decided here, by hashing the file's bytes as a git blob and
comparing them with the committed blob. Every call also overrides the settings
that could run a command (``core.fsmonitor``, ``core.hooksPath``, ``core.pager``),
runs without a shell, without optional locks, without a terminal prompt, without
network protocols and in the C locale; a git that cannot be run is "not in git".
"""

from __future__ import annotations

import hashlib
import os
import subprocess
from pathlib import Path
from typing import Any

__all__ = ["GitError", "git_info", "git_show", "run_git"]


class GitError(ValueError):
    """git could not give what was asked; the message says why, in git's words where it gave any."""


#: ``-c`` settings given to every git call: nothing the repository configures is run
SAFE_SETTINGS = (
    "core.fsmonitor=false",
    "core.hooksPath=/dev/null",
    "core.pager=cat",
    "core.untrackedCache=false",
    "protocol.allow=never",
)

_SAFE_ENV = {
    "LC_ALL": "C",
    "GIT_TERMINAL_PROMPT": "0",
    "GIT_OPTIONAL_LOCKS": "0",
    "GIT_PAGER": "cat",
    "GIT_EXTERNAL_DIFF": "",
    "GIT_ASKPASS": "",
    "SSH_ASKPASS": "",
}


def _git(folder: Path, *args: str) -> subprocess.CompletedProcess[bytes]:
    settings = [item for setting in SAFE_SETTINGS for item in ("-c", setting)]
    return subprocess.run(
        ["git", "--no-optional-locks", *settings, "-C", str(folder), *args],
        capture_output=True,
        timeout=30,
        check=False,
        env={**os.environ, **_SAFE_ENV},
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
        # cat-file gives the committed bytes; no textconv or filter driver runs
        done = _git(folder, "cat-file", "blob", f"{rev}:{relative}")
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
    True when the file's bytes are not those of the file in that commit (changed,
    not committed at all, or not a plain file there). None outside a work tree or
    when git cannot be run.
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
    listed = run_git(top_path, "ls-tree", "-z", commit, "--", relative)
    algorithm = run_git(top_path, "rev-parse", "--show-object-format")
    if listed is None or algorithm is None:
        return None
    committed = _blob_id(listed, relative)
    try:
        data = path.read_bytes()
    except OSError:
        return None
    return {
        "commit": commit,
        "path_in_repo": relative,
        "modified": committed is None or committed != _hash_blob(data, algorithm.strip()),
    }


def _blob_id(listing: str, relative: str) -> str | None:
    """The object id of the regular file ``relative`` in ``ls-tree -z`` output, or None."""
    for entry in listing.split("\0"):
        meta, _, name = entry.partition("\t")
        parts = meta.split()
        if (
            name == relative
            and len(parts) == 3
            and parts[1] == "blob"
            and parts[0] in ("100644", "100755")
        ):
            return parts[2]
    return None


def _hash_blob(data: bytes, algorithm: str) -> str:
    """The git object id of ``data`` as a blob (``sha1`` or ``sha256`` repositories)."""
    digest = hashlib.new("sha256" if algorithm == "sha256" else "sha1")
    digest.update(b"blob %d\0" % len(data))
    digest.update(data)
    return digest.hexdigest()
