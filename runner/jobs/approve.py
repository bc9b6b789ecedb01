"""``lotproof approve``: sign a run's review or release, or approve a recipe for use.

:func:`approve_run` checks the run's whole record first (a record that does not
verify is never signed) and then adds one signed, chained record to
``RUN/approvals.jsonl`` (:mod:`lotproof.runner.record.approvals`).
:func:`approve_recipe` checks the recipe completely (an invalid recipe is never
approved) and writes its detached approval beside it
(:mod:`lotproof.runner.record.recipe_approval`).
"""

from __future__ import annotations

from pathlib import Path

from lotproof.runner.evaluate.environment import utc_now
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.record.approvals import (
    Approval,
    ApprovalError,
    ApprovalIntegrityError,
    append_approval,
)
from lotproof.runner.record.layout import VERDICTS_FILE, is_within
from lotproof.runner.record.recipe_approval import RecipeApproval, write_recipe_approval
from lotproof.runner.record.signing import load_private_key
from lotproof.runner.record.verify import verify_run

__all__ = ["approve_recipe", "approve_run"]


def approve_run(
    run_dir: Path, private_key: Path, *, role: str, name: str, comment: str = ""
) -> Approval:
    """Sign ``role`` (``reviewed`` or ``released``) of the finished run in ``run_dir``.

    Raises
    ------
    ApprovalError
        Not a run folder; or the role does not follow the approvals so far
        (released before reviewed, released twice); or the name is not acceptable.
    ApprovalIntegrityError
        The run's record is altered or unfinished (nothing is signed).
    SigningError
        The private key cannot be read.
    """
    run_dir = Path(run_dir)
    if not (run_dir / VERDICTS_FILE).is_file():
        raise ApprovalError(f"{run_dir}: not a run folder (no {VERDICTS_FILE})")
    if is_within(run_dir, private_key):
        raise ApprovalError(f"{private_key}: a private key must never sit in the run folder")
    load_private_key(private_key)  # a bad key fails before the record is read

    def intact_seal() -> str:
        report = verify_run(run_dir)
        if report.status != "intact" or report.seal is None:
            first = report.problems[0] if report.problems else report.status
            raise ApprovalIntegrityError(
                f"{run_dir}: the record is {report.status} ({first}); nothing was signed"
            )
        return report.seal

    return append_approval(
        run_dir, intact_seal, private_key, role=role, name=name, comment=comment, time_utc=utc_now()
    )


def approve_recipe(
    recipe_path: Path, private_key: Path, *, name: str, comment: str = ""
) -> RecipeApproval:
    """Approve the exact bytes of the recipe at ``recipe_path``, signed by ``private_key``.

    Raises
    ------
    RecipeError
        The recipe is invalid (nothing is approved).
    ApprovalError
        Its approval file exists already, or the name is not acceptable.
    SigningError
        The private key cannot be read.
    """
    recipe = load_recipe(recipe_path)
    load_private_key(private_key)
    return write_recipe_approval(
        recipe, private_key, approver=name, comment=comment, time_utc=utc_now()
    )
