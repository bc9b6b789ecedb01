"""The run record against outside standards and tools.

coreutils ``sha256sum -c`` reads SHA256SUMS; RFC 8785's own examples for canonical
JSON; RFC 8032's Ed25519 test vector 1 through our key loading; the DSSE protocol's
published PAE and signature example; the ``prov`` library reads our PROV-JSON.
"""

from __future__ import annotations

import base64
import hashlib
import json
import shutil
import struct
import subprocess
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.asymmetric.utils import encode_dss_signature
from cryptography.hazmat.primitives.hashes import SHA256
from cryptography.hazmat.primitives.serialization import (
    Encoding,
    NoEncryption,
    PrivateFormat,
    PublicFormat,
)

from lotproof.runner.record.export import pae, prov_document
from lotproof.runner.record.layout import LEDGER_FILE, SIGNATURE_FILE, SUMS_FILE
from lotproof.runner.record.ledger import LedgerWriter, canonical, write_sha256sums
from lotproof.runner.record.signing import sign_seal
from lotproof.runner.record.verify import verify_run

SHA256SUM = shutil.which("sha256sum")


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


# ---------------------------------------------------------------- coreutils


@pytest.mark.skipif(SHA256SUM is None, reason="needs coreutils sha256sum")
def test_sha256sum_checks_our_sums_file(tmp_path: Path) -> None:
    (tmp_path / "kept" / "disc 01").mkdir(parents=True)
    files = {
        "images.csv": b"image,status\n",
        "kept/disc 01/clean.tif": bytes(range(256)),
        "verdicts.json": b"{}\n",
        "empty.csv": b"",
    }
    for name, data in files.items():
        (tmp_path / name).write_bytes(data)
    write_sha256sums(tmp_path, list(files))
    # source: GNU coreutils sha256sum -c (the real tool, run here)
    done = subprocess.run(
        [SHA256SUM, "--strict", "-c", SUMS_FILE],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert sorted(done.stdout.splitlines()) == sorted(f"{name}: OK" for name in files)
    # and it fails, like verify, once a file changes
    (tmp_path / "verdicts.json").write_bytes(b"{ }\n")
    done = subprocess.run(
        [SHA256SUM, "-c", SUMS_FILE], cwd=tmp_path, capture_output=True, text=True, check=False
    )
    assert done.returncode == 1
    assert "verdicts.json: FAILED" in done.stdout


@pytest.mark.skipif(SHA256SUM is None, reason="needs coreutils sha256sum")
def test_our_sums_lines_are_what_sha256sum_prints(tmp_path: Path) -> None:
    (tmp_path / "b.csv").write_bytes(b"x,y\n1,2\n")
    (tmp_path / "a.tif").write_bytes(b"II*\x00")
    write_sha256sums(tmp_path, ["b.csv", "a.tif"])
    # source: GNU coreutils sha256sum output format, "<hex>  <name>" (text mode)
    printed = subprocess.run(
        [SHA256SUM, "a.tif", "b.csv"], cwd=tmp_path, capture_output=True, text=True, check=True
    ).stdout
    assert (tmp_path / SUMS_FILE).read_text() == printed


# ---------------------------------------------------------------- RFC 8785


# source: RFC 8785 Appendix B, "Number Serialization Samples" (IEEE 754 bits -> JSON text)
APPENDIX_B = [
    ("0000000000000000", "0"),
    ("8000000000000000", "0"),
    ("0000000000000001", "5e-324"),
    ("8000000000000001", "-5e-324"),
    ("7fefffffffffffff", "1.7976931348623157e+308"),
    ("ffefffffffffffff", "-1.7976931348623157e+308"),
    ("4340000000000000", "9007199254740992"),
    ("c340000000000000", "-9007199254740992"),
    ("4430000000000000", "295147905179352830000"),
    ("44b52d02c7e14af5", "9.999999999999997e+22"),
    ("44b52d02c7e14af6", "1e+23"),
    ("44b52d02c7e14af7", "1.0000000000000001e+23"),
    ("444b1ae4d6e2ef4e", "999999999999999700000"),
    ("444b1ae4d6e2ef4f", "999999999999999900000"),
    ("444b1ae4d6e2ef50", "1e+21"),
    ("3eb0c6f7a0b5ed8c", "9.999999999999997e-7"),
    ("3eb0c6f7a0b5ed8d", "0.000001"),
    ("41b3de4355555553", "333333333.3333332"),
    ("41b3de4355555554", "333333333.33333325"),
    ("41b3de4355555555", "333333333.3333333"),
    ("41b3de4355555556", "333333333.3333334"),
    ("41b3de4355555557", "333333333.33333343"),
    ("becbf647612f3696", "-0.0000033333333333333333"),
    ("43143ff3c1cb0959", "1424953923781206.2"),
]


@pytest.mark.parametrize(("bits", "expected"), APPENDIX_B)
def test_rfc8785_appendix_b_numbers(bits: str, expected: str) -> None:
    value = struct.unpack(">d", bytes.fromhex(bits))[0]
    assert canonical({"v": value}) == b'{"v":' + expected.encode() + b"}"


@pytest.mark.parametrize("bits", ["7fffffffffffffff", "7ff0000000000000"])
def test_rfc8785_appendix_b_non_finite_become_null(bits: str) -> None:
    # source: RFC 8785 Appendix B lists NaN and Infinity as not representable; our
    # documented rule writes them as null rather than failing the run
    value = struct.unpack(">d", bytes.fromhex(bits))[0]
    assert canonical({"v": value}) == b'{"v":null}'


def test_rfc8785_property_sorting_example() -> None:
    # source: RFC 8785 section 3.2.3, sorting of object properties by UTF-16 code units
    value = {
        "\u20ac": "Euro Sign",
        "\r": "Carriage Return",
        "\ufb33": "Hebrew Letter Dalet With Dagesh",
        "1": "One",
        "\U0001f600": "Emoji: Grinning Face",
        "\u0080": "Control",
        "\u00f6": "Latin Small Letter O With Diaeresis",
    }
    order = [
        "Carriage Return",
        "One",
        "Control",
        "Latin Small Letter O With Diaeresis",
        "Euro Sign",
        "Emoji: Grinning Face",
        "Hebrew Letter Dalet With Dagesh",
    ]
    text = canonical(value).decode("utf-8")
    positions = [text.index(f'"{label}"') for label in order]
    assert positions == sorted(positions)


def test_rfc8785_section_3_2_2_example() -> None:
    # source: RFC 8785 sections 3.2.2 and 3.2.3, the sample input and its canonical form
    sample = (
        '{"numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],'
        ' "string": "\\u20ac$\\u000F\\u000aA\'\\u0042\\u0022\\u005c\\\\\\"\\/",'
        ' "literals": [null, true, false]}'
    )
    expected = (
        '{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],'
        '"string":"\u20ac$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}'
    )
    assert canonical(json.loads(sample)) == expected.encode("utf-8")


# ---------------------------------------------------------------- RFC 8032


# source: RFC 8032 section 7.1, TEST 1 (empty message)
RFC8032_SECRET = "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60"
RFC8032_PUBLIC = "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"
RFC8032_SIGNATURE = "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b"


def _rfc_keys(folder: Path) -> tuple[Path, Path]:
    key = Ed25519PrivateKey.from_private_bytes(bytes.fromhex(RFC8032_SECRET))
    private, public = folder / "rfc.key", folder / "rfc.pub"
    private.write_bytes(key.private_bytes(Encoding.PEM, PrivateFormat.PKCS8, NoEncryption()))
    public.write_bytes(
        key.public_key().public_bytes(Encoding.PEM, PublicFormat.SubjectPublicKeyInfo)
    )
    return private, public


def test_rfc8032_test_1_through_our_key_files(tmp_path: Path) -> None:
    from lotproof.runner.record.signing import load_private_key, load_public_key

    private, public = _rfc_keys(tmp_path)
    key = load_private_key(private)
    raw_public = key.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)
    assert raw_public.hex() == RFC8032_PUBLIC
    assert key.sign(b"").hex() == RFC8032_SIGNATURE
    load_public_key(public).verify(bytes.fromhex(RFC8032_SIGNATURE), b"")


def test_seal_signature_is_ed25519_over_the_hex_text(tmp_path: Path) -> None:
    private, public = _rfc_keys(tmp_path)
    run = tmp_path / "run"
    run.mkdir()
    with LedgerWriter(run / LEDGER_FILE) as ledger:
        seal = ledger.append_end(time_utc="t", exit_code=0)
    signature = sign_seal(seal, private)
    # source: RFC 8032 section 5.1 (Ed25519 is deterministic): the RFC key signs the
    # seal's ASCII hex exactly as cryptography's own Ed25519 does
    rfc_key = Ed25519PrivateKey.from_private_bytes(bytes.fromhex(RFC8032_SECRET))
    assert signature == rfc_key.sign(seal.encode("ascii"))
    (run / SIGNATURE_FILE).write_bytes(base64.b64encode(signature) + b"\n")
    assert verify_run(run, public).signature == "valid"


def test_a_key_fingerprint_is_the_sha256_of_the_raw_public_key(tmp_path: Path) -> None:
    from lotproof.runner.record.signing import fingerprint, load_public_key, load_trust

    _, public = _rfc_keys(tmp_path)
    # source: RFC 8032 section 7.1 TEST 1's public key; sha256 by hashlib, not by lotproof
    expected = hashlib.sha256(bytes.fromhex(RFC8032_PUBLIC)).hexdigest()
    assert fingerprint(load_public_key(public)) == expected
    trust = tmp_path / "trust"
    trust.mkdir()
    shutil.copy(public, trust / "rfc.pub")
    assert list(load_trust(trust)) == [expected]


def test_an_approval_record_signs_the_rfc8785_bytes_of_its_six_fields(tmp_path: Path) -> None:
    from lotproof.runner.record.approvals import append_approval, signed_fields

    private, _ = _rfc_keys(tmp_path)
    run = tmp_path / "run"
    run.mkdir()
    seal = "ab" * 32
    record = append_approval(
        run, lambda: seal, private, role="reviewed", name="Zoë Ünal", comment="ok",
        time_utc="2026-12-02T09:14:03Z",
    )  # fmt: skip
    # source: RFC 8785 section 3.2.3 (keys sorted by UTF-16 code units; strings as they are,
    # no escapes for non-ASCII), written out by hand
    payload = (
        '{"comment":"ok","name":"Zoë Ünal","prev":"' + seal + '","role":"reviewed",'
        '"seal":"' + seal + '","time_utc":"2026-12-02T09:14:03Z"}'
    ).encode("utf-8")
    assert (
        signed_fields(seal, "reviewed", "Zoë Ünal", "2026-12-02T09:14:03Z", "ok", seal) == payload
    )
    # source: RFC 8032 section 5.1 (Ed25519 is deterministic): the RFC key over those bytes
    rfc_key = Ed25519PrivateKey.from_private_bytes(bytes.fromhex(RFC8032_SECRET))
    assert record.signature == rfc_key.sign(payload)
    line = json.loads((run / "approvals.jsonl").read_bytes())
    assert base64.b64decode(line["signature"]) == rfc_key.sign(payload)
    assert line["key"] == hashlib.sha256(bytes.fromhex(RFC8032_PUBLIC)).hexdigest()


# ---------------------------------------------------------------- DSSE


def test_dsse_protocol_pae_example() -> None:
    # source: DSSE protocol.md, "Test Vectors": PAE of "hello world" and its type
    assert pae("http://example.com/HelloWorld", b"hello world") == (
        b"DSSEv1 29 http://example.com/HelloWorld 11 hello world"
    )


def test_dsse_protocol_signature_verifies_over_our_pae() -> None:
    # source: DSSE protocol.md, "Test Vectors": ECDSA P-256 / SHA-256 public key and the
    # signature of the example envelope; it verifies only over the exact PAE bytes
    x = 46950820868899156662930047687818585632848591499744589407958293238635476079160
    y = 5640078356564379163099075877009565129882514886557779369047442380624545832820
    public = ec.EllipticCurvePublicNumbers(x, y, ec.SECP256R1()).public_key()
    raw = base64.b64decode(
        "A3JqsQGtVsJ2O2xqrI5IcnXip5GToJ3F+FnZ+O88SjtR6rDAajabZKciJTfUiHqJPcIAriEGAHTVeCUjW2JIZA=="
    )
    der = encode_dss_signature(int.from_bytes(raw[:32], "big"), int.from_bytes(raw[32:], "big"))
    message = pae("http://example.com/HelloWorld", base64.b64decode("aGVsbG8gd29ybGQ="))
    public.verify(der, message, ec.ECDSA(SHA256()))


# ---------------------------------------------------------------- PROV


def _prov_run(tmp_path: Path) -> Path:
    run = tmp_path / "run"
    (run / "kept" / "d1").mkdir(parents=True)
    recipe = (
        b"format: lotproof/1\nname: prov-test\nrevision: 1\npixel_size: 0.5 um\n"
        b"inputs:\n  section: '*.tif'\nsteps:\n  spots:\n    apply: threshold\n    to: section\n"
        b"    method: fixed\n    level: 100\n  stats:\n    apply: measure\n    to: spots\n"
        b"    connectivity: 8\n"
    )
    (run / "recipe.yaml").write_bytes(recipe)
    (run / "kept" / "d1" / "spots.tif").write_bytes(b"II*\x00")
    with LedgerWriter(run / LEDGER_FILE) as ledger:
        ledger.append(
            "run-start",
            tool={"name": "lotproof", "version": "0.1.0"},
            python="3.11",
            libraries={},
            platform="p",
            cpu="c",
            command=["lotproof"],
            user="qa",
            host="h",
            time_utc="2026-12-01T21:45:00Z",
        )
        ledger.append(
            "recipe",
            path="recipes/p.yaml",
            sha256=_sha(recipe),
            name="prov-test",
            revision=1,
            git=None,
        )
        for image in ("d1.tif", "sub/d2.tif"):
            ledger.append(
                "input",
                image=image,
                input="section",
                path=image,
                size=4,
                sha256=_sha(image.encode()),
                shape=[4, 4],
                dtype="uint8",
                calibration={},
            )
            for step, kind in (("spots", "threshold"), ("stats", "measure")):
                ledger.append(
                    "step",
                    image=image,
                    step=step,
                    kind=kind,
                    version="1",
                    key=_sha(f"k{image}{step}".encode()),
                    checksum=_sha(f"c{image}{step}".encode()),
                    cache="computed",
                    seconds=0.0,
                )
        for name in ("recipe.yaml", "kept/d1/spots.tif"):
            data = (run / name).read_bytes()
            ledger.append("output", path=name, sha256=_sha(data), size=len(data))
        ledger.append_end(time_utc="2026-12-01T21:45:01Z", exit_code=0)
    return run


def test_prov_library_reads_our_document(tmp_path: Path) -> None:
    from prov.model import (
        ProvActivity,
        ProvAgent,
        ProvAssociation,
        ProvDocument,
        ProvEntity,
        ProvGeneration,
        ProvUsage,
    )

    run = _prov_run(tmp_path)
    assert verify_run(run).status == "intact"
    document = prov_document(run)
    # source: the prov library (W3C PROV-JSON reader of the PROV reference tooling)
    parsed = ProvDocument.deserialize(content=json.dumps(document), format="json")

    def count(kind: type) -> int:
        return len(list(parsed.get_records(kind)))

    # recipe + 2 inputs + 4 step results + 2 outputs
    assert count(ProvEntity) == 9
    # the run + 2 images x 2 steps
    assert count(ProvActivity) == 5
    assert count(ProvAgent) == 2
    # run uses recipe and 2 inputs; each threshold uses its input, each measure its threshold
    assert count(ProvUsage) == 3 + 4
    assert count(ProvGeneration) == 4 + 2
    assert count(ProvAssociation) == 2 + 4
    result = parsed.get_record("lp:result/sub%2Fd2.tif/spots")[0]
    checksum = [v for k, v in result.attributes if k.localpart == "checksum"]
    assert checksum == [_sha(b"csub/d2.tifspots")]
    assert parsed.get_record("lp:output/kept/d1/spots.tif")
    # the document survives a round trip through the library unchanged
    again = ProvDocument.deserialize(content=parsed.serialize(format="json"), format="json")
    assert again == parsed
