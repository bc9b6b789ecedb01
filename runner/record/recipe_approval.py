"""Approved recipes: a detached, signed approval of a recipe's exact bytes.

A method revision is approved once and then run many times. ``lotproof approve
RECIPE --key FILE --name ...`` writes ``NAME-rREVISION.approval.json`` beside the
recipe (for ``recipes/filter-disc-porosity.yaml`` at revision 4:
``recipes/filter-disc-porosity-r4.approval.json``)::

    {"format": "lotproof-recipe-approval/1",
     "recipe": {"sha256": ..., "name": "filter-disc-porosity", "revision": 4},
     "role": "approved", "approver": PRINTED NAME, "time_utc": "2026-11-20T10:02:11Z",
     "comment": TEXT, "key": FINGERPRINT, "signature": BASE64}

``signature`` is the Ed25519 signature over the canonical JSON (RFC 8785) of
every field but ``key`` and ``signature`` (:func:`signed_fields`); ``key`` is the
signing key's fingerprint. The approval covers the exact bytes: an edit of the
recipe, even of a comment, needs a new revision and a new approval. The file is
never overwritten.

``run --require-approved --trust DIR`` (:func:`find_recipe_approval`) refuses a
recipe whose bytes carry no valid approval by a key of the trust folder; a run
with a trust folder records the approval it found in its ledger
(``recipe-approval`` event), and the report shows it.
"""

from __future__ import annotations

import base64
import binascii
import json
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.evaluate.hashing import file_sha256
from lotproof.runner.files import read_file, write_file
from lotproof.runner.recipe.model import Recipe
from lotproof.runner.record.approvals import ApprovalError, check_name
from lotproof.runner.record.ledger import canonical
from lotproof.runner.record.signing import TrustedKey, sign_payload, signature_matches

__all__ = [
    "APPROVAL_FORMAT",
    "APPROVAL_SUFFIX",
    "RecipeApproval",
    "RecipeNotApproved",
    "approval_path",
    "find_recipe_approval",
    "read_recipe_approval",
    "signed_fields",
    "write_recipe_approval",
]

APPROVAL_FORMAT = "lotproof-recipe-approval/1"
#: ``NAME-rREVISION`` + this is the approval's file name, beside the recipe
APPROVAL_SUFFIX = ".approval.json"
_MAX_BYTES = 64 * 1024


class RecipeNotApproved(LotproofError, ValueError):
    """``--require-approved``: the recipe carries no valid approval by a trusted key (exit 2)."""

    exit_code = EXIT_INVALID


@dataclass(frozen=True)
class RecipeApproval:
    """One recipe approval, as read from its file."""

    path: Path
    sha256: str
    name: str
    revision: int
    approver: str
    time_utc: str
    comment: str
    key: str
    signature: bytes
    #: the trust folder's key file that verified it ("" before checking)
    key_file: str = ""

    def event(self) -> dict[str, Any]:
        """The fields of the ledger's ``recipe-approval`` event."""
        return {
            "file": self.path.name,
            "file_sha256": file_sha256(self.path),
            "sha256": self.sha256,
            "name": self.name,
            "revision": self.revision,
            "role": "approved",
            "approver": self.approver,
            "time_utc": self.time_utc,
            "comment": self.comment,
            "key": self.key,
            "key_file": Path(self.key_file).name if self.key_file else "",
            "signature": base64.b64encode(self.signature).decode("ascii"),
        }


def approval_path(recipe: Recipe) -> Path:
    """Where the approval of ``recipe`` is: ``NAME-rREVISION.approval.json`` beside it."""
    return Path(recipe.path).parent / f"{recipe.name}-r{recipe.revision}{APPROVAL_SUFFIX}"


def signed_fields(
    sha256: str, name: str, revision: int, approver: str, time_utc: str, comment: str
) -> bytes:
    """The bytes a recipe approval's signature covers (canonical JSON)."""
    return canonical(
        {
            "format": APPROVAL_FORMAT,
            "recipe": {"sha256": sha256, "name": name, "revision": revision},
            "role": "approved",
            "approver": approver,
            "time_utc": time_utc,
            "comment": comment,
        }
    )


def write_recipe_approval(
    recipe: Recipe, private_key: Path, *, approver: str, comment: str = "", time_utc: str
) -> RecipeApproval:
    """Sign the approval of ``recipe``'s exact bytes and write it beside the recipe.

    Raises
    ------
    ApprovalError
        The approval file exists already (never overwritten), or the name is not
        acceptable.
    SigningError
        The private key cannot be read.
    """
    approver = check_name(approver)
    comment = comment.strip()
    path = approval_path(recipe)
    if path.exists() or path.is_symlink():
        raise ApprovalError(
            f"{path}: exists already; an approval is never replaced (a changed recipe needs "
            "a new revision, and its own approval)"
        )
    payload = signed_fields(
        recipe.sha256, recipe.name, recipe.revision, approver, time_utc, comment
    )
    signature, key = sign_payload(private_key, payload)
    document = {
        "format": APPROVAL_FORMAT,
        "recipe": {"sha256": recipe.sha256, "name": recipe.name, "revision": recipe.revision},
        "role": "approved",
        "approver": approver,
        "time_utc": time_utc,
        "comment": comment,
        "key": key,
        "signature": base64.b64encode(signature).decode("ascii"),
    }
    text = json.dumps(document, indent=2, ensure_ascii=False) + "\n"
    try:
        write_file(path, text.encode("utf-8"), replace=False)
    except FileExistsError:
        raise ApprovalError(f"{path}: exists already; an approval is never replaced") from None
    except OSError as err:
        raise ApprovalError(f"{path}: cannot write ({err.strerror})") from None
    return read_recipe_approval(path)


def read_recipe_approval(path: Path) -> RecipeApproval:
    """The approval in ``path``; :class:`RecipeNotApproved` says why it is not one."""
    try:
        document = json.loads(read_file(path, max_bytes=_MAX_BYTES).decode("utf-8"))
    except FileNotFoundError:
        raise RecipeNotApproved(f"{path}: no approval of this recipe revision") from None
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise RecipeNotApproved(f"{path}: not a recipe approval ({err})") from None
    recipe = document.get("recipe") if isinstance(document, dict) else None
    texts = ("approver", "time_utc", "comment", "key", "signature")
    if (
        not isinstance(recipe, dict)
        or document.get("format") != APPROVAL_FORMAT
        or document.get("role") != "approved"
        or not all(isinstance(document.get(k), str) for k in texts)
        or not isinstance(recipe.get("sha256"), str)
        or not isinstance(recipe.get("name"), str)
        or not isinstance(recipe.get("revision"), int)
    ):
        raise RecipeNotApproved(f"{path}: not a {APPROVAL_FORMAT} document")
    try:
        signature = base64.b64decode(document["signature"], validate=True)
    except (ValueError, binascii.Error):
        signature = b""
    return RecipeApproval(
        Path(path),
        recipe["sha256"],
        recipe["name"],
        recipe["revision"],
        document["approver"],
        document["time_utc"],
        document["comment"],
        document["key"],
        signature,
    )


def find_recipe_approval(recipe: Recipe, trust: dict[str, TrustedKey]) -> RecipeApproval:
    """The valid approval of ``recipe``'s exact bytes by a key of ``trust``.

    Raises
    ------
    RecipeNotApproved
        Naming the file and why: none there, of other bytes, of another recipe or
        revision, signed by a key not in the trust folder, or a signature that
        does not match.
    """
    path = approval_path(recipe)
    found = read_recipe_approval(path)
    if (found.name, found.revision) != (recipe.name, recipe.revision):
        raise RecipeNotApproved(
            f"{path}: approves {found.name} r{found.revision}, not {recipe.label}"
        )
    if found.sha256 != recipe.sha256:
        raise RecipeNotApproved(
            f"{path}: approves other bytes (sha256 {found.sha256}); {recipe.path} has "
            f"{recipe.sha256}: the recipe changed after it was approved (give it a new "
            "revision and have that approved)"
        )
    trusted = trust.get(found.key)
    if trusted is None:
        raise RecipeNotApproved(
            f"{path}: signed by key {found.key}, which is not in the trust folder"
        )
    payload = signed_fields(
        found.sha256, found.name, found.revision, found.approver, found.time_utc, found.comment
    )
    if not signature_matches(trusted.key, found.signature, payload):
        raise RecipeNotApproved(
            f"{path}: the signature does not match the approval and the key {trusted.path}"
        )
    return replace(found, key_file=str(trusted.path))
