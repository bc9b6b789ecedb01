"""Exports of a run record in open formats: an in-toto attestation and W3C PROV-JSON.

Both are built from the run folder's ledger alone (:meth:`lotproof.runner.record.reading.RunFolder.events`
checks its chain first and refuses a broken or unfinished one), so what they state
is what the sealed record states. The one exception is the step graph for PROV's
``used`` relations when step events do not carry it: then the run folder's
``recipe.yaml`` is read, and only if its sha256 is the one the ledger recorded.

* :func:`in_toto_statement` -- an in-toto Statement v1 whose subjects are the run's
  output files with their sha256 digests, and whose predicate (type
  :data:`PREDICATE_TYPE`) names the recipe digest, the inputs' digests, the tool and
  library versions and the verdicts.
* :func:`dsse_envelope` -- that statement signed with Ed25519 in a DSSE v1 envelope.
* :func:`prov_document` -- entities for inputs, intermediate step results and
  outputs, an activity per (image, step) and one for the run, the software agent.

References
----------
in-toto Attestation Framework, Statement layer v1,
https://github.com/in-toto/attestation/blob/main/spec/v1/statement.md
DSSE: Dead Simple Signing Envelope, protocol v1,
https://github.com/secure-systems-lab/dsse/blob/master/protocol.md
PROV-JSON, W3C Member Submission (2013), https://www.w3.org/Submission/2013/SUBM-prov-json-20130424/
"""

from __future__ import annotations

import base64
import hashlib
from pathlib import Path
from typing import Any
from urllib.parse import quote

from lotproof.runner.record.layout import LEDGER_FILE, RECIPE_FILE
from lotproof.runner.record.ledger import LedgerError, canonical, line_hash
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.signing import load_private_key
from lotproof.runner.record.verify import verify_run

__all__ = [
    "PAYLOAD_TYPE",
    "PREDICATE_TYPE",
    "PROV_NAMESPACE",
    "STATEMENT_TYPE",
    "dsse_envelope",
    "in_toto_statement",
    "pae",
    "prov_document",
]

STATEMENT_TYPE = "https://in-toto.io/Statement/v1"
#: lotproof's own predicate type; ``.invalid`` is reserved never to resolve (RFC 2606)
PREDICATE_TYPE = "https://lotproof.invalid/run/v1"
PAYLOAD_TYPE = "application/vnd.in-toto+json"
PROV_NAMESPACE = "https://lotproof.invalid/prov#"


def _of_type(events: list[dict[str, Any]], kind: str) -> list[dict[str, Any]]:
    return [e for e in events if e.get("type") == kind]


def _one(events: list[dict[str, Any]], kind: str) -> dict[str, Any]:
    found = _of_type(events, kind)
    return found[0] if found else {}


def _fields(event: dict[str, Any], *drop: str) -> dict[str, Any]:
    return {k: v for k, v in event.items() if k not in ("seq", "type", "prev", *drop)}


def _seal(run_dir: Path) -> str:
    data = RunFolder(run_dir, error=LedgerError).bytes(LEDGER_FILE) or b""
    last = data.rstrip(b"\n").rsplit(b"\n", 1)[-1]
    return line_hash(last)


def _intact_events(run_dir: Path) -> list[dict[str, Any]]:
    """The ledger's events, once :func:`verify_run` found the whole record intact."""
    report = verify_run(run_dir)
    if report.status != "intact":
        first = report.problems[0] if report.problems else report.status
        raise LedgerError(f"{run_dir}: the record is {report.status} ({first}); nothing exported")
    return RunFolder(run_dir).events()


def in_toto_statement(run_dir: Path) -> dict[str, Any]:
    """The run as an in-toto Statement v1 (a plain dict, ready for JSON).

    ``subject`` lists every output file of the run (``name`` = path in the run
    folder, ``digest.sha256``), sorted by name. ``predicate`` holds the seal, the
    method (name, revision, recipe sha256, git), every input with its digest, the
    tool, Python, library and platform versions as recorded at run start, every
    verdict, the lot verdict and the run's start, end and exit code.

    Raises
    ------
    LedgerError
        When the record does not verify as intact (missing, altered or unfinished).
    """
    events = _intact_events(run_dir)
    start, recipe, end = _one(events, "run-start"), _one(events, "recipe"), events[-1]
    outputs = sorted(_of_type(events, "output"), key=lambda e: e["path"])
    subject = [{"name": e["path"], "digest": {"sha256": e["sha256"]}} for e in outputs]
    inputs = [
        {
            "image": e.get("image"),
            "input": e.get("input"),
            "path": e.get("path"),
            "size": e.get("size"),
            "digest": {"sha256": e.get("sha256")},
        }
        for e in _of_type(events, "input")
    ]
    lot = _one(events, "lot-verdict")
    predicate = {
        "seal": _seal(run_dir),
        "method": {
            "name": recipe.get("name"),
            "revision": recipe.get("revision"),
            "recipe": {"path": recipe.get("path"), "digest": {"sha256": recipe.get("sha256")}},
            "git": recipe.get("git"),
        },
        "inputs": inputs,
        "tool": start.get("tool"),
        "python": start.get("python"),
        "libraries": start.get("libraries"),
        "platform": start.get("platform"),
        "cpu": start.get("cpu"),
        "verdicts": [_fields(e) for e in _of_type(events, "verdict")],
        "lot_verdict": lot.get("verdict"),
        "started_utc": start.get("time_utc"),
        "finished_utc": end.get("time_utc"),
        "exit_code": end.get("exit_code"),
    }
    return {
        "_type": STATEMENT_TYPE,
        "subject": subject,
        "predicateType": PREDICATE_TYPE,
        "predicate": predicate,
    }


def pae(payload_type: str, payload: bytes) -> bytes:
    """DSSE v1 pre-authentication encoding of ``payload`` and its type.

    Notes
    -----
    ``PAE(type, body) = "DSSEv1" SP LEN(type) SP type SP LEN(body) SP body``, where
    ``LEN`` is the byte length in ASCII decimal and ``SP`` one space.
    """
    kind = payload_type.encode("utf-8")
    return b"DSSEv1 %d %s %d %s" % (len(kind), kind, len(payload), payload)


def dsse_envelope(statement: dict[str, Any], private_key: Path) -> dict[str, Any]:
    """``statement`` signed with the Ed25519 key at ``private_key``, as a DSSE envelope.

    The payload is the statement's RFC 8785 canonical JSON; the signature covers
    :func:`pae` of it (payload type :data:`PAYLOAD_TYPE`); ``keyid`` is the sha256
    hex of the public key's raw 32 bytes. Base64 is the standard alphabet, padded.
    """
    from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

    key = load_private_key(private_key)
    body = canonical(statement)
    signature = key.sign(pae(PAYLOAD_TYPE, body))
    raw_public = key.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)
    return {
        "payload": base64.b64encode(body).decode("ascii"),
        "payloadType": PAYLOAD_TYPE,
        "signatures": [
            {
                "keyid": hashlib.sha256(raw_public).hexdigest(),
                "sig": base64.b64encode(signature).decode("ascii"),
            }
        ],
    }


# ---------------------------------------------------------------- PROV


def _id(*parts: Any) -> str:
    # PROV qualified names: keep letters, digits and - . _ ~; percent-encode the rest
    # (an image id's own "/" included, so every name reads back to one image and step)
    return "lp:" + "/".join(quote(str(p), safe="-._~") for p in parts)


def _step_sources(run_dir: Path, events: list[dict[str, Any]]) -> dict[str, list[str]]:
    """step name -> the names it is applied to, from step events or the recorded recipe."""
    sources: dict[str, list[str]] = {}
    for e in _of_type(events, "step"):
        if isinstance(e.get("to"), list):
            sources[e["step"]] = [str(t) for t in e["to"]]
    if sources or not _of_type(events, "step"):
        return sources
    recipe_event = _one(events, "recipe")
    folder = RunFolder(run_dir, error=LedgerError)
    path = folder.path / RECIPE_FILE
    if not folder.exists(RECIPE_FILE):
        return {}
    raw = folder.recipe()
    if hashlib.sha256(raw).hexdigest() != recipe_event.get("sha256"):
        raise LedgerError(f"{path}: its sha256 is not the one the ledger recorded; verify the run")
    from lotproof.runner.recipe.load import parse_recipe

    recipe = parse_recipe(raw, str(path))
    return {name: list(step.to) for name, step in recipe.steps.items()}


def prov_document(run_dir: Path) -> dict[str, Any]:
    """The run as a W3C PROV-JSON document (a plain dict, ready for JSON).

    Entities: the recipe, every input file (``lp:input/IMAGE/INPUT``), every step
    result (``lp:result/IMAGE/STEP``, with its checksum and cache key) and every
    output file (``lp:output/PATH``), each with its sha256. Activities: the run
    (``lp:run``, with start and end times) and one per (image, step)
    (``lp:step/IMAGE/STEP``). Agents: the software (lotproof and its version) and,
    when recorded, the user who ran it, on whose behalf the software acted.
    Relations: ``used`` (a step uses its inputs' entities; the run uses the recipe
    and the inputs), ``wasGeneratedBy`` (step results by their steps, outputs by the
    run), ``wasAssociatedWith`` (every activity with the software; the run with the
    user), ``wasInformedBy`` (each step by the run).

    Raises
    ------
    LedgerError
        When the record does not verify as intact (missing, altered or unfinished).
    """
    events = _intact_events(run_dir)
    start, recipe, end = _one(events, "run-start"), _one(events, "recipe"), events[-1]
    tool = start.get("tool")
    version = tool.get("version") if isinstance(tool, dict) else tool
    entity: dict[str, Any] = {}
    activity: dict[str, Any] = {}
    agent: dict[str, Any] = {}
    used: dict[str, Any] = {}
    generated: dict[str, Any] = {}
    associated: dict[str, Any] = {}
    informed: dict[str, Any] = {}
    delegated: dict[str, Any] = {}
    count = {"n": 0}

    def relation(table: dict[str, Any], **fields: str) -> None:
        count["n"] += 1
        table[f"_:r{count['n']}"] = {f"prov:{k}": v for k, v in fields.items()}

    def typed(value: Any) -> Any:
        # PROV attribute values are literals: nested records go in as their JSON text
        if value is None:
            return ""
        if isinstance(value, (dict, list)):
            return canonical(value).decode("utf-8")
        return value

    software = _id("agent", "lotproof", version or "unknown")
    agent[software] = {
        "prov:type": {"$": "prov:SoftwareAgent", "type": "prov:QUALIFIED_NAME"},
        "prov:label": f"lotproof {version}" if version else "lotproof",
        "lp:python": typed(start.get("python")),
        "lp:platform": typed(start.get("platform")),
    }
    run = _id("run", _seal(run_dir))
    run_attrs: dict[str, Any] = {
        "prov:label": f"run of {recipe.get('name')} r{recipe.get('revision')}"
    }
    if start.get("time_utc"):
        run_attrs["prov:startTime"] = start["time_utc"]
    if end.get("time_utc"):
        run_attrs["prov:endTime"] = end["time_utc"]
    activity[run] = run_attrs
    relation(associated, activity=run, agent=software)
    user = start.get("user")
    if user:
        person = _id("agent", "user", user)
        agent[person] = {
            "prov:type": {"$": "prov:Person", "type": "prov:QUALIFIED_NAME"},
            "prov:label": str(user),
        }
        relation(associated, activity=run, agent=person)
        relation(delegated, delegate=software, responsible=person, activity=run)

    recipe_id = _id("recipe", recipe.get("sha256"))
    entity[recipe_id] = {
        "prov:label": f"{recipe.get('name')} r{recipe.get('revision')}",
        "lp:sha256": typed(recipe.get("sha256")),
        "lp:path": typed(recipe.get("path")),
    }
    relation(used, activity=run, entity=recipe_id)

    # what each name (input or step) of each image is, as an entity
    produced: dict[tuple[str, str], str] = {}
    for e in _of_type(events, "input"):
        eid = _id("input", e.get("image"), e.get("input"))
        entity[eid] = {
            "prov:label": typed(e.get("path")),
            "lp:sha256": typed(e.get("sha256")),
            "lp:size": typed(e.get("size")),
            "lp:dtype": typed(e.get("dtype")),
        }
        produced[(str(e.get("image")), str(e.get("input")))] = eid
        relation(used, activity=run, entity=eid)

    sources = _step_sources(run_dir, events)
    for e in _of_type(events, "step"):
        image, step = str(e.get("image")), str(e.get("step"))
        aid = _id("step", image, step)
        rid = _id("result", image, step)
        activity[aid] = {
            "prov:label": f"{step} ({e.get('kind')} v{e.get('version')}) on {image}",
            "lp:kind": typed(e.get("kind")),
            "lp:version": typed(e.get("version")),
            "lp:cache": typed(e.get("cache")),
        }
        entity[rid] = {
            "prov:label": f"{step} of {image}",
            "lp:checksum": typed(e.get("checksum")),
            "lp:key": typed(e.get("key")),
        }
        for source in sources.get(step, []):
            if (image, source) in produced:
                relation(used, activity=aid, entity=produced[(image, source)])
        relation(generated, entity=rid, activity=aid)
        relation(associated, activity=aid, agent=software)
        relation(informed, informed=aid, informant=run)
        produced[(image, step)] = rid

    for e in _of_type(events, "output"):
        oid = _id("output", *str(e.get("path")).split("/"))
        entity[oid] = {
            "prov:label": typed(e.get("path")),
            "lp:sha256": typed(e.get("sha256")),
            "lp:size": typed(e.get("size")),
        }
        relation(generated, entity=oid, activity=run)

    document: dict[str, Any] = {
        "prefix": {"lp": PROV_NAMESPACE},
        "entity": entity,
        "activity": activity,
        "agent": agent,
        "used": used,
        "wasGeneratedBy": generated,
        "wasAssociatedWith": associated,
        "wasInformedBy": informed,
    }
    if delegated:
        document["actedOnBehalfOf"] = delegated
    return {k: v for k, v in document.items() if v}
