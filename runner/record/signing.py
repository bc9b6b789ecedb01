"""Keys and signatures: Ed25519 over a run's seal, approvals and trust folders.

``lotproof keygen`` makes a key pair; ``run --sign KEY`` writes ``seal.sig``, the
base64 of the 64-byte Ed25519 signature over the seal's ASCII hex digits; verify
checks it with the public key. Private keys never sit inside a run folder.

A key is named everywhere by its **fingerprint**: the sha256 of its 32 raw
public-key bytes, as 64 hex digits (:func:`fingerprint`). Approvals carry the
fingerprint of the key that signed them (:func:`sign_payload`), and a **trust
folder** (:func:`load_trust`) is a folder of PEM public keys (``*.pem`` or
``*.pub``; other files are ignored) by which they are checked. A private key in
a trust folder is refused: the folder is handed around, a private key never is.
"""

from __future__ import annotations

import base64
import hashlib
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.files import read_file, write_file
from lotproof.runner.record.layout import SIGNATURE_FILE, inside_run_folder, is_within
from lotproof.runner.record.ledger import LedgerWriteError

if TYPE_CHECKING:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import (
        Ed25519PrivateKey,
        Ed25519PublicKey,
    )

__all__ = [
    "SigningError",
    "TrustedKey",
    "fingerprint",
    "keygen",
    "load_private_key",
    "load_public_key",
    "load_trust",
    "read_signature",
    "sign_payload",
    "sign_seal",
    "signature_matches",
    "write_signature",
]

_HEX64 = re.compile(r"^[0-9a-f]{64}$")
#: a PEM key or a signature file is a few hundred bytes; anything far larger is not one
_MAX_KEY_BYTES = 64 * 1024
#: the names a trust folder's public keys have
_TRUST_SUFFIXES = (".pem", ".pub")


class SigningError(LotproofError, ValueError):
    """A key cannot be made, read or used (exit 2: nothing was signed or checked)."""

    exit_code = EXIT_INVALID


def load_public_key(path: Path) -> Ed25519PublicKey:
    """The Ed25519 public key in the PEM file ``path``; :class:`SigningError` otherwise."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
    from cryptography.hazmat.primitives.serialization import load_pem_public_key

    try:
        key = load_pem_public_key(read_file(Path(path), max_bytes=_MAX_KEY_BYTES))
    except OSError as err:
        raise SigningError(f"{path}: cannot read the public key ({err.strerror})") from None
    except ValueError:
        raise SigningError(f"{path}: not a PEM public key") from None
    if not isinstance(key, Ed25519PublicKey):
        raise SigningError(f"{path}: not an Ed25519 public key")
    return key


def fingerprint(key: Ed25519PublicKey | Ed25519PrivateKey) -> str:
    """The key's fingerprint: sha256 (hex) of the 32 raw bytes of its public key."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

    public = key.public_key() if isinstance(key, Ed25519PrivateKey) else key
    return hashlib.sha256(public.public_bytes(Encoding.Raw, PublicFormat.Raw)).hexdigest()


@dataclass(frozen=True)
class TrustedKey:
    """A public key of a trust folder: its file, fingerprint and the key itself."""

    path: Path
    fingerprint: str
    key: Ed25519PublicKey


def load_trust(folder: Path) -> dict[str, TrustedKey]:
    """The public keys of the trust folder ``folder``, by fingerprint.

    Every ``*.pem`` and ``*.pub`` file directly in the folder (hidden files and
    other names are ignored) must be an Ed25519 public key.

    Raises
    ------
    SigningError
        When the folder is missing or holds no key, or a key file is not an
        Ed25519 public key (a private key there is named as such).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise SigningError(f"{folder}: no such trust folder (a folder of PEM public keys)")
    keys: dict[str, TrustedKey] = {}
    for path in sorted(folder.iterdir()):
        if path.name.startswith(".") or path.suffix not in _TRUST_SUFFIXES:
            continue
        try:
            head = read_file(path, max_bytes=_MAX_KEY_BYTES)
        except OSError as err:
            raise SigningError(f"{path}: cannot read the key ({err.strerror})") from None
        if b"PRIVATE KEY" in head:
            raise SigningError(
                f"{path}: a private key in the trust folder {folder}; a trust folder holds "
                "public keys only: remove it (and treat the key as disclosed)"
            )
        key = load_public_key(path)
        found = fingerprint(key)
        keys.setdefault(found, TrustedKey(path, found, key))
    if not keys:
        raise SigningError(f"{folder}: the trust folder holds no public key (*.pem, *.pub)")
    return keys


def sign_payload(private_key: Path, payload: bytes) -> tuple[bytes, str]:
    """Ed25519 signature (64 raw bytes) over ``payload``, and the signing key's fingerprint."""
    key = load_private_key(private_key)
    return key.sign(payload), fingerprint(key)


def signature_matches(key: Ed25519PublicKey, signature: bytes, payload: bytes) -> bool:
    """Whether ``signature`` is ``key``'s Ed25519 signature over ``payload``."""
    from cryptography.exceptions import InvalidSignature

    try:
        key.verify(signature, payload)
    except InvalidSignature:
        return False
    return True


def load_private_key(path: Path) -> Ed25519PrivateKey:
    """The Ed25519 private key in the unencrypted PEM file ``path``; :class:`SigningError` otherwise."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import load_pem_private_key

    try:
        key = load_pem_private_key(read_file(Path(path), max_bytes=_MAX_KEY_BYTES), password=None)
    except OSError as err:
        raise SigningError(f"{path}: cannot read the private key ({err.strerror})") from None
    except (ValueError, TypeError):
        raise SigningError(f"{path}: not an unencrypted PEM private key") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise SigningError(f"{path}: not an Ed25519 private key")
    return key


def read_signature(path: Path) -> bytes | None:
    """The 64 signature bytes of ``seal.sig`` (one line of base64), or None when it is not that."""
    try:
        text = read_file(path, max_bytes=_MAX_KEY_BYTES).decode("ascii")
    except (OSError, UnicodeDecodeError):
        return None
    if not text.endswith("\n") or text.count("\n") != 1:
        return None
    try:
        raw = base64.b64decode(text[:-1], validate=True)
    except ValueError:
        return None
    return raw if len(raw) == 64 else None


def keygen(private_path: Path, public_path: Path) -> None:
    """Make an Ed25519 key pair: PEM (PKCS#8, unencrypted) private key, mode 0600.

    Never overwrites a file, and refuses a private key path inside a run folder.
    """
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import (
        Encoding,
        NoEncryption,
        PrivateFormat,
        PublicFormat,
    )

    private_path, public_path = Path(private_path), Path(public_path)
    if os.path.abspath(private_path) == os.path.abspath(public_path):
        raise SigningError("the private and public key need two different files")
    for path in (private_path, public_path):
        if path.exists() or path.is_symlink():
            raise SigningError(f"{path}: exists already; keys are never overwritten")
    run = inside_run_folder(private_path)
    if run is not None:
        raise SigningError(
            f"{private_path}: inside the run folder {run}; keep private keys elsewhere"
        )
    key = Ed25519PrivateKey.generate()
    private_pem = key.private_bytes(Encoding.PEM, PrivateFormat.PKCS8, NoEncryption())
    public_pem = key.public_key().public_bytes(Encoding.PEM, PublicFormat.SubjectPublicKeyInfo)
    _write_key(private_path, private_pem, 0o600)
    try:
        _write_key(public_path, public_pem, 0o644)
    except SigningError:
        os.unlink(private_path)
        raise


def sign_seal(seal: str, private_key: Path) -> bytes:
    """Ed25519 signature (64 raw bytes) over the seal's ASCII hex digits."""
    if not isinstance(seal, str) or not _HEX64.match(seal):
        raise SigningError(f"{seal!r} is not a seal (64 lower-case hex digits)")
    return load_private_key(private_key).sign(seal.encode("ascii"))


def write_signature(run_dir: Path, seal: str, private_key: Path) -> Path:
    """Sign ``seal`` and write ``RUN/seal.sig`` (base64 text and a newline); never overwrites.

    Refuses a private key that lies inside the run folder.
    """
    run_dir = Path(run_dir)
    if is_within(run_dir, private_key):
        raise SigningError(f"{private_key}: a private key must never sit in the run folder")
    signature = sign_seal(seal, private_key)
    target = run_dir / SIGNATURE_FILE
    try:
        write_file(target, base64.b64encode(signature) + b"\n", replace=False)
    except FileExistsError:
        raise LedgerWriteError(f"{target}: exists already; a signature is never replaced") from None
    except OSError as err:
        raise LedgerWriteError(f"{target}: cannot write ({err.strerror})") from None
    return target


def _write_key(path: Path, data: bytes, mode: int) -> None:
    try:
        write_file(path, data, replace=False, mode=mode)
    except FileExistsError:
        raise SigningError(f"{path}: exists already; never overwritten") from None
    except OSError as err:
        raise SigningError(f"{path}: cannot write ({err.strerror})") from None
