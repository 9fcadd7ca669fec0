"""Ed25519 signatures of run manifests (``manifest.sig``), with the ``cryptography`` package.

A writer of the store can rewrite a manifest and its digests consistently; it cannot
produce a signature under a private key it does not hold.  ``new_key_pair`` writes a
key pair as PEM files (PKCS #8 private key, mode 0600; SubjectPublicKeyInfo public
key); :func:`signature_file` signs a manifest digest; :func:`check_signature` checks a
``manifest.sig`` against the run's manifest digest and, optionally, trusted keys.

``manifest.sig`` (UTF-8 JSON object, format specified in ``traces/README.md`` §12):
``format`` (``"kktrace-signature"``), ``format_version`` (1), ``algorithm``
(``"Ed25519"``), ``signer`` (the key's name), ``public_key`` (base64 of the 32 raw
bytes), ``public_key_sha256`` (hex SHA-256 of those bytes), ``manifest_sha256``,
``signed`` (ISO 8601 UTC time) and ``signature`` (base64 of 64 bytes).  The signed
message is the canonical JSON (sorted keys, no spaces, ASCII) of every field except
``signature``, so the signer's name and the time are covered as well as the digest.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..errors import InvalidInputError

__all__ = ["SIGNING_KEY_ENV", "PublicKey", "new_key_pair", "load_private_key",
           "load_public_key", "signature_file", "check_signature", "key_name"]

#: environment variable naming the private key that ``train`` signs with
SIGNING_KEY_ENV = "KKTRACE_SIGNING_KEY"
SIG_FORMAT = "kktrace-signature"
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}")
_PRIVATE_SUFFIX = ".private.pem"
_PUBLIC_SUFFIX = ".public.pem"
_MAX_KEY_FILE = 16 << 10


def _crypto() -> Any:
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric import ed25519

    return serialization, ed25519


@dataclass(frozen=True)
class PublicKey:
    """A trusted Ed25519 public key: its name, raw 32 bytes and their SHA-256."""

    name: str
    raw: bytes
    path: str | None = None

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.raw).hexdigest()


def key_name(path: str | Path) -> str:
    """Signer name of a key file: its file name without ``.private.pem`` / ``.public.pem``."""
    name = Path(path).name
    for suffix in (_PRIVATE_SUFFIX, _PUBLIC_SUFFIX, ".pem"):
        if name.endswith(suffix):
            return name[: -len(suffix)] or name
    return name


def new_key_pair(name: str, directory: str | Path) -> tuple[Path, Path]:
    """Write ``NAME.private.pem`` (mode 0600) and ``NAME.public.pem`` into ``directory``.

    Existing files are never overwritten.  Returns (private path, public path).
    """
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise InvalidInputError(f"key name {name!r} must be 1-64 letters, digits, '.', '_' or "
                                "'-', starting with a letter or digit")
    serialization, ed25519 = _crypto()
    d = Path(directory)
    if not d.is_dir():
        raise InvalidInputError(f"key folder {str(d)!r} does not exist")
    priv_path, pub_path = d / f"{name}{_PRIVATE_SUFFIX}", d / f"{name}{_PUBLIC_SUFFIX}"
    for p in (priv_path, pub_path):
        if os.path.lexists(p):
            raise InvalidInputError(f"{p}: exists already; keys are never overwritten")
    key = ed25519.Ed25519PrivateKey.generate()
    priv = key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                             serialization.NoEncryption())
    pub = key.public_key().public_bytes(serialization.Encoding.PEM,
                                        serialization.PublicFormat.SubjectPublicKeyInfo)
    for path, data, mode in ((priv_path, priv, 0o600), (pub_path, pub, 0o644)):
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
        try:
            os.write(fd, data)
            os.fsync(fd)
        finally:
            os.close(fd)
    return priv_path, pub_path


def _read_key_file(path: str | Path, what: str) -> bytes:
    p = Path(path)
    try:
        size = p.stat().st_size
        if size > _MAX_KEY_FILE:
            raise InvalidInputError(f"{p}: {size} bytes is too large for a {what} file")
        return p.read_bytes()
    except FileNotFoundError:
        raise InvalidInputError(f"{what} file {str(p)!r} does not exist") from None
    except IsADirectoryError:
        raise InvalidInputError(f"{what} file {str(p)!r} is a directory") from None
    except OSError as exc:
        raise InvalidInputError(f"{what} file {str(p)!r}: {exc.strerror}") from None


def load_private_key(path: str | Path) -> tuple[Any, str]:
    """(Ed25519 private key, signer name) from a PEM file written by :func:`new_key_pair`."""
    serialization, ed25519 = _crypto()
    data = _read_key_file(path, "private key")
    try:
        key = serialization.load_pem_private_key(data, password=None)
    except (ValueError, TypeError) as exc:
        raise InvalidInputError(f"{path}: not an unencrypted PEM private key ({exc})") from None
    if not isinstance(key, ed25519.Ed25519PrivateKey):
        raise InvalidInputError(f"{path}: not an Ed25519 private key")
    return key, key_name(path)


def load_public_key(path: str | Path) -> PublicKey:
    """A trusted public key from a PEM file (``NAME.public.pem``)."""
    serialization, ed25519 = _crypto()
    data = _read_key_file(path, "public key")
    try:
        key = serialization.load_pem_public_key(data)
    except (ValueError, TypeError) as exc:
        raise InvalidInputError(f"{path}: not a PEM public key ({exc})") from None
    if not isinstance(key, ed25519.Ed25519PublicKey):
        raise InvalidInputError(f"{path}: not an Ed25519 public key")
    raw = key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    return PublicKey(name=key_name(path), raw=raw, path=str(path))


def _message(doc: dict[str, Any]) -> bytes:
    body = {k: v for k, v in doc.items() if k != "signature"}
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode()


def signature_file(key: Any, signer: str, manifest_sha256: str, signed: str) -> bytes:
    """Bytes of ``manifest.sig`` for a manifest digest, signed by ``key``."""
    serialization, _ = _crypto()
    raw = key.public_key().public_bytes(serialization.Encoding.Raw,
                                        serialization.PublicFormat.Raw)
    doc: dict[str, Any] = {
        "format": SIG_FORMAT, "format_version": 1, "algorithm": "Ed25519", "signer": signer,
        "public_key": base64.b64encode(raw).decode(),
        "public_key_sha256": hashlib.sha256(raw).hexdigest(),
        "manifest_sha256": manifest_sha256, "signed": signed,
    }
    doc["signature"] = base64.b64encode(key.sign(_message(doc))).decode()
    return (json.dumps(doc, indent=1, ensure_ascii=True) + "\n").encode()


def check_signature(
    data: bytes | None, manifest_sha256: str | None, trusted: Sequence[PublicKey] | None
) -> tuple[list[str], list[str], str | None, bool]:
    """Check ``manifest.sig`` bytes (None: absent) against the run's manifest digest.

    Returns (problems, notes, signer text or None, trusted).  Without ``trusted`` keys a
    signature is checked against the public key it carries (so damage is found) and a
    note says that the signer was not checked; with them, the signature must verify
    under one of them, and an unsigned run is a problem.
    """
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric import ed25519

    F = "manifest.sig"
    if data is None:
        if trusted:
            return ([f"{F}: missing; the run is unsigned, but a signature by a trusted key "
                     f"({', '.join(k.name for k in trusted)}) is required"], [], None, False)
        return [], [], None, False
    try:
        doc = json.loads(data.decode("utf-8"))
        if not isinstance(doc, dict):
            raise ValueError("not an object")
        raw = base64.b64decode(doc["public_key"], validate=True)
        sig = base64.b64decode(doc["signature"], validate=True)
        signer = doc["signer"]
        if (doc.get("format") != SIG_FORMAT or doc.get("format_version") != 1
                or doc.get("algorithm") != "Ed25519" or not isinstance(signer, str)
                or len(raw) != 32 or len(sig) != 64
                or doc.get("public_key_sha256") != hashlib.sha256(raw).hexdigest()):
            raise ValueError("unexpected fields")
    except (ValueError, KeyError, TypeError, UnicodeDecodeError) as exc:
        return [f"{F}: malformed ({exc})"], [], None, False
    fp = hashlib.sha256(raw).hexdigest()[:16]
    who = f"{signer} (key sha256 {fp}…, signed {doc.get('signed')})"
    if doc.get("manifest_sha256") != manifest_sha256:
        return [f"{F}: signs manifest digest {doc.get('manifest_sha256')}, but manifest.json "
                f"has {manifest_sha256}"], [], who, False
    keys = list(trusted) if trusted else [PublicKey(name=signer, raw=raw)]
    for k in keys:
        if k.raw != raw:
            continue
        try:
            ed25519.Ed25519PublicKey.from_public_bytes(k.raw).verify(sig, _message(doc))
        except InvalidSignature:
            return [f"{F}: the signature by {who} does not verify"], [], who, False
        if trusted:
            return [], [], who, True
        return [], [f"signed by {who}; not checked against a trusted key (use --trusted)"], \
            who, False
    return ([f"{F}: signed by {who}, which is not a trusted key "
             f"(trusted: {', '.join(f'{k.name} {k.sha256[:16]}…' for k in keys)})"],
            [], who, False)
