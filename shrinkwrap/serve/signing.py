"""Optional Ed25519 signatures of an artifact's manifest.json (the `cryptography` library).

The manifest's sha256 table catches accidents — a truncated copy, a flipped byte — but anyone who swaps a
file can rewrite the table too. A signature made with a private key the swapper does not hold closes that:
`run`/`package --signing-key PRIVATE.pem` write manifest.sig (the base64 signature of manifest.json's exact
bytes) beside the manifest; `predict`/`bench --trusted-key PUBLIC.pem` refuse an artifact without one or
with a wrong one. The manifest covers every other file by hash, so signing it covers the whole artifact.
manifest.sig itself is not in the manifest (it cannot be: it signs it).

Torch-free, and cryptography is imported only when a key is given, so the predict path stays slim.
"""
from __future__ import annotations

import base64
import binascii
import os
from pathlib import Path

from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import MANIFEST_FILE, SIGNATURE_FILE, write_text_atomic

PASSPHRASE_ENV = "SHRINKWRAP_SIGNING_PASSPHRASE"  # for an encrypted private key; never on the command line


def _read_pem(path: Path, flag: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise UserError(f"{flag} {path}: no such file") from None
    except OSError as e:
        raise UserError(f"{flag} {path}: cannot read — {e.strerror or e}") from None


def load_private_key(path: Path, flag: str = "--signing-key"):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import load_pem_private_key

    passphrase = os.environ.get(PASSPHRASE_ENV)
    try:
        key = load_pem_private_key(_read_pem(path, flag), password=passphrase.encode() if passphrase else None)
    except (ValueError, TypeError) as e:
        raise UserError(f"{flag} {path}: not a usable PEM private key — {str(e).splitlines()[0] if str(e) else e}"
                        f" (an encrypted key takes its passphrase from ${PASSPHRASE_ENV})") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise UserError(f"{flag} {path}: a {type(key).__name__.lstrip('_')} — an Ed25519 private key is needed "
                        f"(openssl genpkey -algorithm ed25519 -out {path})")
    return key


def load_public_key(path: Path, flag: str = "--trusted-key"):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
    from cryptography.hazmat.primitives.serialization import load_pem_public_key

    try:
        key = load_pem_public_key(_read_pem(path, flag))
    except (ValueError, TypeError) as e:
        raise UserError(f"{flag} {path}: not a PEM public key — {str(e).splitlines()[0] if str(e) else e}") from None
    if not isinstance(key, Ed25519PublicKey):
        raise UserError(f"{flag} {path}: not an Ed25519 public key (openssl pkey -in PRIVATE.pem -pubout)")
    return key


def sign_artifact(folder: Path, key_path: Path, flag: str = "--signing-key") -> Path:
    """Writes folder/manifest.sig, the signature of folder/manifest.json with the key at `key_path`."""
    key = load_private_key(key_path, flag)
    signature = key.sign((Path(folder) / MANIFEST_FILE).read_bytes())
    write_text_atomic(Path(folder) / SIGNATURE_FILE, base64.b64encode(signature).decode() + "\n")
    return Path(folder) / SIGNATURE_FILE


def check_signature(folder: Path, key_path: Path, flag: str = "--trusted-key") -> None:
    """A UserError unless folder/manifest.sig is a valid signature of folder/manifest.json by the key."""
    from cryptography.exceptions import InvalidSignature

    folder = Path(folder)
    key = load_public_key(key_path, flag)
    sig_path = folder / SIGNATURE_FILE
    if not sig_path.is_file():
        raise UserError(f"{folder}: unsigned artifact (no {SIGNATURE_FILE}) — {flag} accepts only artifacts signed "
                        f"with its key")
    try:
        signature = base64.b64decode(sig_path.read_bytes().strip(), validate=True)
        manifest = (folder / MANIFEST_FILE).read_bytes()
    except (binascii.Error, ValueError):
        raise UserError(f"{sig_path}: not a base64 signature") from None
    except OSError as e:
        raise UserError(f"{folder / MANIFEST_FILE}: cannot read — {e.strerror or e}") from None
    try:
        key.verify(signature, manifest)
    except InvalidSignature:
        raise UserError(f"{sig_path}: the signature does not match {MANIFEST_FILE} under {flag} {key_path} — "
                        f"signed by another key, or the manifest was changed after signing") from None
