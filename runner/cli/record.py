"""Commands on run records: ``verify``, ``approve``, ``keygen``, ``export``, ``diff``, ``compare``.

Each is a thin shell over :mod:`lotproof.runner.record.verify`,
:mod:`lotproof.runner.jobs.approve`, :mod:`lotproof.runner.record.export`,
:mod:`lotproof.runner.recipe.diff` and :mod:`lotproof.runner.record.compare`.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import click
from rich.table import Table as RichTable
from rich.text import Text

from lotproof.runner.cli.console import emit_json, fail_recipe, mark, stderr, stdout
from lotproof.runner.errors import EXIT_INVALID, RecipeError
from lotproof.runner.files import write_file
from lotproof.runner.record.layout import inside_run_folder

__all__ = ["approve", "compare", "diff", "export", "keygen_command", "verify"]

_STATUS_STYLE = {"intact": "green", "altered": "bold red", "unfinished": "yellow"}


def _table(title: str, columns: tuple[str, ...]) -> RichTable:
    # fold long cells onto more lines: a record's numbers and paths are never cut short
    table = RichTable(title=title, title_justify="left")
    for column in columns:
        table.add_column(column, overflow="fold")
    return table


def _number(value: float | None) -> str:
    from lotproof.runner.record.folder import format_number

    return "-" if value is None else format_number(value)


# ---------------------------------------------------------------- verify


_TRUST_HELP = "folder of trusted public keys (PEM) [default: $LOTPROOF_TRUST]"


@click.command()
@click.argument("run", type=click.Path(file_okay=False, path_type=Path))
@click.option(
    "--key",
    "key",
    type=click.Path(dir_okay=False, path_type=Path),
    default=None,
    help="Ed25519 public key (PEM): check the signature of the seal (seal.sig), and the "
    "approvals this key signed",
)
@click.option(
    "--trust",
    type=click.Path(file_okay=False, path_type=Path),
    envvar="LOTPROOF_TRUST",
    default=None,
    help="folder of trusted public keys (PEM): every approval must be signed by one of them; "
    "seal.sig, when there, too [default: $LOTPROOF_TRUST]",
)
@click.option(
    "--seal",
    "seal",
    default=None,
    help="the seal printed at the end of the run: check the record ends in it",
)
@click.option(
    "--approval",
    "approval",
    default=None,
    metavar="HASH",
    help="the hash `lotproof approve` printed: check that approval record is still there",
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def verify(
    run: Path,
    key: Path | None,
    trust: Path | None,
    seal: str | None,
    approval: str | None,
    as_json: bool,
) -> None:
    """Check that RUN's record is intact: the ledger chain, every file, the signature, and
    the review and release records (who signed what, and when).

    Exit 0 intact; 4 altered (the first failing line or file is named first: an
    approval removed, reordered or altered too) or unfinished (the run never ended);
    2 a key or trust folder cannot be read.
    """
    from lotproof.runner.record.verify import verify_run

    if not run.is_dir():
        stderr().print(Text(f"{run}: no such run folder"))
        raise SystemExit(EXIT_INVALID)
    report = verify_run(run, key, expected_seal=seal, trust=trust, expected_approval=approval)
    if as_json:
        emit_json(report.as_dict())
        raise SystemExit(report.exit_code)
    console = stdout()
    console.print(
        Text(report.status.upper(), style=_STATUS_STYLE[report.status]) + Text(f"  {run}")
    )
    console.print(f"seal: {report.seal or '-'}")
    console.print(
        f"{report.events} ledger events, {report.checked_files} files checked, "
        f"signature: {report.signature}"
    )
    if report.approvals:
        console.print("approvals (signed after the run, beside the sealed files):")
        for a in report.approvals:
            checked = {
                "valid": f"signature valid ({a.key_file})",
                "invalid": "SIGNATURE INVALID",
                "unknown key": "signed by a key not in the trust folder",
                "not checked": "signature not checked (give --trust DIR or --key PUB)",
            }[a.check]
            console.print(Text(f"  {a.seq}. {a.role} by {a.name} at {a.time_utc}; {checked}"))
            console.print(f"     key {a.key}")
            if a.comment:
                console.print(Text(f"     comment: {a.comment}"))
        console.print(f"last approval: {report.last_approval}")
    else:
        console.print("approvals: none (not reviewed, not released)")
    if report.problems:
        table = _table("problems, first first", ("#", "problem"))
        for i, problem in enumerate(report.problems, 1):
            table.add_row(str(i), Text(problem))
        console.print(table)
    raise SystemExit(report.exit_code)


# ---------------------------------------------------------------- approve


@click.command()
@click.argument("target", metavar="RUN|RECIPE", type=click.Path(exists=True, path_type=Path))
@click.option(
    "--key",
    "key",
    type=click.Path(dir_okay=False, exists=True, path_type=Path),
    required=True,
    help="your Ed25519 private key (from `lotproof keygen`)",
)
@click.option(
    "--role",
    type=click.Choice(["reviewed", "released"]),
    default=None,
    help="for a run: what your signature means (a release needs a review before it)",
)
@click.option("--name", "name", required=True, help="your printed name, as it is to appear")
@click.option("--comment", default="", help="a comment signed with the approval")
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def approve(
    target: Path, key: Path, role: str | None, name: str, comment: str, as_json: bool
) -> None:
    """Sign RUN's review or release, or approve RECIPE's exact bytes for use.

    A run (a folder): --role reviewed or released; the signed record is added to
    RUN/approvals.jsonl beside the sealed files, chained to the one before; the run
    is never edited. A recipe (a file): writes NAME-rREVISION.approval.json beside it.
    Exit 0 signed; 2 refused (released before reviewed, released twice, an invalid
    recipe, a bad key, an approval that exists); 4 the run's record does not verify.
    """
    from lotproof.runner.jobs.approve import approve_recipe, approve_run

    if target.is_dir():
        if role is None:
            raise click.UsageError("a run's approval needs --role reviewed or --role released")
        record = approve_run(target, key, role=role, name=name, comment=comment)
        if as_json:
            emit_json({"run_dir": str(target), **record.as_dict()})
            return
        console = stdout()
        console.print(Text(f"{record.role} by {record.name} at {record.time_utc}"))
        console.print(f"key: {record.key}")
        console.print(f"record {record.seq} of {target}; its hash (keep it): {record.hash}")
        return
    if role is not None:
        raise click.UsageError("--role is for a run; a recipe's approval means approved for use")
    try:
        approved = approve_recipe(target, key, name=name, comment=comment)
    except RecipeError as err:
        fail_recipe(err, as_json)
    if as_json:
        emit_json(
            {
                "recipe": str(target),
                "approval": str(approved.path),
                "sha256": approved.sha256,
                "name": approved.name,
                "revision": approved.revision,
                "approver": approved.approver,
                "time_utc": approved.time_utc,
                "key": approved.key,
            }
        )
        return
    console = stdout()
    console.print(
        Text(
            f"{approved.name} r{approved.revision} approved by {approved.approver} at "
            f"{approved.time_utc}"
        )
    )
    console.print(f"recipe sha256: {approved.sha256}")
    console.print(f"key: {approved.key}")
    console.print(Text(f"wrote {approved.path}"))


# ---------------------------------------------------------------- keygen


@click.command("keygen")
@click.argument("private", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("public", type=click.Path(dir_okay=False, path_type=Path))
def keygen_command(private: Path, public: Path) -> None:
    """Make an Ed25519 key pair: PRIVATE (PEM, mode 0600) and PUBLIC (PEM).

    Never overwrites a file. Keep PRIVATE out of run folders; hand PUBLIC to
    whoever verifies (`lotproof verify RUN --key PUBLIC`).
    """
    from lotproof.runner.record.signing import keygen

    keygen(private, public)
    stderr().print(f"wrote {private} (private, keep it safe) and {public} (public)")


# ---------------------------------------------------------------- export


@click.command()
@click.argument("run", type=click.Path(file_okay=False, exists=True, path_type=Path))
@click.option("--attestation", is_flag=True, help="an in-toto Statement v1 of the run")
@click.option("--prov", is_flag=True, help="the run as a W3C PROV-JSON document")
@click.option(
    "--key",
    "key",
    type=click.Path(dir_okay=False, exists=True, path_type=Path),
    default=None,
    help="Ed25519 private key (PEM): sign the attestation in a DSSE envelope",
)
@click.option(
    "--out",
    "out",
    type=click.Path(dir_okay=False, path_type=Path),
    default=None,
    help="write to this new file instead of stdout (never overwritten)",
)
def export(run: Path, attestation: bool, prov: bool, key: Path | None, out: Path | None) -> None:
    """Export RUN's record: --attestation (in-toto, signed with --key) or --prov.

    Read from the ledger alone, which must be intact and finished (exit 4 if not).
    """
    from lotproof.runner.record.export import (
        dsse_envelope,
        in_toto_statement,
        prov_document,
    )

    if attestation == prov:
        raise click.UsageError("give exactly one of --attestation and --prov")
    if key is not None and not attestation:
        raise click.UsageError("--key signs an attestation; it goes with --attestation")
    if attestation:
        document: Any = in_toto_statement(run)
        if key is not None:
            document = dsse_envelope(document, key)
    else:
        document = prov_document(run)
    text = json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    if out is None:
        click.echo(text, nl=False)
        return
    if inside_run_folder(out) is not None:
        raise click.UsageError(f"{out}: inside a run folder; run folders are never changed")
    try:
        write_file(out, text.encode("utf-8"), replace=False)
    except FileExistsError:
        raise click.UsageError(f"{out}: exists already; never overwritten") from None
    except OSError as error:
        raise click.UsageError(f"{out}: cannot write ({error.strerror})") from None
    stderr().print(f"wrote {out}")


# ---------------------------------------------------------------- diff


def _change_rows(table: RichTable, changes: list[Any]) -> None:
    for c in changes:
        table.add_row(Text(c.where), Text(_text(c.a)), Text(_text(c.b)), Text(c.note))


def _text(value: Any) -> str:
    if value is None:
        return "(none)"
    if isinstance(value, (list, dict)):
        return json.dumps(value, ensure_ascii=False)
    return str(value)


@click.command()
@click.argument("a")
@click.argument("b")
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def diff(a: str, b: str, as_json: bool) -> None:
    """Semantic diff of two recipes A and B (files, or PATH@GITREV).

    Steps, parameters (units resolved) and limits; formatting, comments and key
    order are ignored. Exit 0, or 2 when a recipe is invalid.
    """
    from lotproof.runner.recipe.diff import diff_recipes

    try:
        result = diff_recipes(a, b)
    except RecipeError as err:
        fail_recipe(err, as_json)
        return
    if as_json:
        emit_json(result.as_dict())
        return
    console = stdout()
    console.print(
        Text(f"{result.a} ({result.a_label}) -> {result.b} ({result.b_label})", style="bold")
    )
    for warning in result.warnings:
        console.print(Text(f"warning: {warning}", style="yellow"))
    if result.identical:
        note = " (only comments or layout differ)" if result.bytes_differ else ""
        console.print(f"identical{note}")
        return
    for label, names in (
        ("steps added", result.steps_added),
        ("steps removed", result.steps_removed),
        ("limits added", result.limits_added),
        ("limits removed", result.limits_removed),
    ):
        if names:
            console.print(f"{label}: " + ", ".join(names))
    changes = result.top + result.steps_changed + result.limits_changed
    if changes:
        table = _table("changed", ("where", "a", "b", "note"))
        _change_rows(table, changes)
        console.print(table)


# ---------------------------------------------------------------- compare


@click.command()
@click.argument("run_a", type=click.Path(file_okay=False, exists=True, path_type=Path))
@click.argument("run_b", type=click.Path(file_okay=False, exists=True, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def compare(run_a: Path, run_b: Path, as_json: bool) -> None:
    """Measurement deltas and verdict changes from RUN_A to RUN_B (B - A).

    Exit 0 whatever differs; 3 when a folder is not a readable run folder.
    """
    from lotproof.runner.record.compare import compare_runs

    result = compare_runs(run_a, run_b)
    if as_json:
        emit_json(result.as_dict())
        return
    console = stdout()

    def method(m: dict[str, Any]) -> str:
        return f"{m.get('name', '?')} r{m.get('revision', '?')}"

    same = "same recipe" if result.same_recipe else "different recipes"
    console.print(
        Text(f"{method(result.method_a)} -> {method(result.method_b)} ({same})", style="bold")
    )
    console.print(
        Text("lot verdict: ")
        + mark(result.lot_verdict_a)
        + Text(" -> ")
        + mark(result.lot_verdict_b)
    )
    for label, names in (
        ("images only in A", result.images_only_a),
        ("images only in B", result.images_only_b),
        ("values only in A", result.columns_only_a),
        ("values only in B", result.columns_only_b),
        ("limits only in A", result.limits_only_a),
        ("limits only in B", result.limits_only_b),
    ):
        if names:
            console.print(Text(f"{label}: " + ", ".join(names), style="yellow"))
    if result.limits:
        table = _table("limits", ("limit", "over", "A", "B", "B - A", "verdict A", "verdict B"))
        for lim in result.limits:
            unit = "" if lim.unit in ("-", "") else f" {lim.unit}"
            table.add_row(
                lim.name,
                lim.over_b,
                _number(lim.value_a) + unit,
                _number(lim.value_b) + unit,
                _number(lim.delta),
                mark(lim.verdict_a),
                mark(lim.verdict_b),
            )
        console.print(table)
    if result.verdict_changes:
        table = _table("verdict changes", ("image", "what", "A", "B"))
        for c in result.verdict_changes:
            table.add_row(c.image, c.what, mark(c.a), mark(c.b))
        console.print(table)
    changed = result.changed_values
    if changed:
        table = _table(
            "values that differ", ("image", "value", "unit", "A", "B", "B - A", "relative")
        )
        for v in changed:
            relative = "-" if v.relative is None else f"{v.relative:+.3%}"
            table.add_row(
                v.image, v.column, v.unit, _number(v.a), _number(v.b), _number(v.absolute), relative
            )
        console.print(table)
    equal = len(result.values) - len(changed)
    console.print(f"{equal} of {len(result.values)} shared values are equal bit for bit")
    if result.identical:
        console.print("identical")
