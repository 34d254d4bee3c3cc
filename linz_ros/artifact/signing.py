"""Signed artifacts: an Ed25519 signature beside the content hash, and the keys to make and check it.

The content hash (``sha256``) finds damage, but anyone who can edit an artifact can
recompute it. A signature by a private key that never leaves the team's build machine
cannot be recomputed: a robot given its team's public keys (``load_artifact(...,
trusted_keys=...)``, the controller's ``trusted_keys`` parameter) accepts only
artifacts signed by one of them.

What covers what: the signature and the hash are both computed over
:func:`~linz_ros.artifact.document.canonical_text` of :func:`~linz_ros.artifact.document.signed_body`
(everything but ``sha256`` and ``signature``). Neither covers the signature, so signing a
sealed artifact leaves its hash as it was, and unsigned artifacts load as before. The
``signature`` field::

    {"algorithm": "ed25519",
     "public_key_sha256": SHA-256 (hex) of the raw 32-byte public key,
     "value": the 64-byte signature, base64}

Keys are PEM files: the private key PKCS#8 without a passphrase (file mode 0600; keep it
on the build machine), the public key SubjectPublicKeyInfo. The ``cryptography``
package is imported only when keys are made or used (``pip install cryptography``);
artifacts load without it when no trusted keys are given.

Public names
------------
generate_keys, load_private_key, load_public_key, key_fingerprint, sign_document,
sign_artifact_file, verify_signature, SIGNATURE_ALGORITHM, PRIVATE_KEY_FILE, PUBLIC_KEY_FILE
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import os
import re
from pathlib import Path
from types import SimpleNamespace
from typing import Any, Sequence

from linz_ros.artifact._files import read_bounded
from linz_ros.artifact.document import canonical_text, read_document, seal, signed_body
from linz_ros.errors import ArtifactError, ConfigError

__all__ = ["SIGNATURE_ALGORITHM", "PRIVATE_KEY_FILE", "PUBLIC_KEY_FILE", "generate_keys", "load_private_key",
           "load_public_key", "key_fingerprint", "sign_document", "sign_artifact_file", "verify_signature"]

SIGNATURE_ALGORITHM = "ed25519"
PRIVATE_KEY_FILE = "linz_signing_key.pem"
PUBLIC_KEY_FILE = "linz_signing_key.pub.pem"
_INSTALL = "pip install cryptography"
_HEX64 = re.compile(r"[0-9a-f]{64}")


def _crypto(field: str) -> SimpleNamespace:
    """The parts of ``cryptography`` used here, imported on first use."""
    try:
        from cryptography.exceptions import InvalidSignature, UnsupportedAlgorithm
        from cryptography.hazmat.primitives import serialization
        from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey
    except ImportError as err:
        raise ConfigError(field, f"signed artifacts need the Python package cryptography ({err}); install it "
                                 f"with {_INSTALL}") from None
    return SimpleNamespace(InvalidSignature=InvalidSignature, UnsupportedAlgorithm=UnsupportedAlgorithm,
                           serialization=serialization, Ed25519PrivateKey=Ed25519PrivateKey,
                           Ed25519PublicKey=Ed25519PublicKey)


def generate_keys(folder: str | Path) -> tuple[Path, Path]:
    """Write a new Ed25519 key pair into ``folder``: the private key (mode 0600) and the public key.

    Parameters
    ----------
    folder : str or pathlib.Path
        Created when missing. Existing key files are never overwritten.

    Returns
    -------
    (pathlib.Path, pathlib.Path)
        The private and the public key file.

    Raises
    ------
    ConfigError
        A key file already exists, the folder cannot be written, or ``cryptography`` is missing.
    """
    c = _crypto("keygen")
    folder = Path(folder).expanduser()
    private_path, public_path = folder / PRIVATE_KEY_FILE, folder / PUBLIC_KEY_FILE
    for path in (private_path, public_path):
        if os.path.lexists(path):
            raise ConfigError("keygen", f"{path} exists; keys are never overwritten (move it away first)")
    key = c.Ed25519PrivateKey.generate()
    private_pem = key.private_bytes(c.serialization.Encoding.PEM, c.serialization.PrivateFormat.PKCS8,
                                    c.serialization.NoEncryption())
    public_pem = key.public_key().public_bytes(c.serialization.Encoding.PEM,
                                               c.serialization.PublicFormat.SubjectPublicKeyInfo)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        _write_new(private_path, private_pem, 0o600)
        _write_new(public_path, public_pem, 0o644)
    except OSError as err:
        raise ConfigError("keygen", f"cannot write {err.filename or folder}: {err.strerror or err}") from None
    return private_path, public_path


def _write_new(path: Path, data: bytes, mode: int) -> None:
    descriptor = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    with os.fdopen(descriptor, "wb") as handle:
        os.fchmod(handle.fileno(), mode)          # whatever the umask
        handle.write(data)


def _key_text(key: str | Path | bytes, source: str) -> bytes:
    if isinstance(key, bytes):
        return key
    return read_bounded(Path(key).expanduser(), source)


def load_private_key(path: str | Path) -> Any:
    """Read an Ed25519 private key (PEM, no passphrase), as :func:`generate_keys` writes it.

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    cryptography.hazmat.primitives.asymmetric.ed25519.Ed25519PrivateKey

    Raises
    ------
    ArtifactError
        The file cannot be read or holds no unencrypted Ed25519 private key.
    ConfigError
        ``cryptography`` is missing.
    """
    c = _crypto("--sign-key")
    source = str(path)
    try:
        key = c.serialization.load_pem_private_key(_key_text(path, source), password=None)
    except (ValueError, TypeError, c.UnsupportedAlgorithm) as err:
        if isinstance(err, ArtifactError):
            raise
        raise ArtifactError(source, "not an unencrypted PEM private key (make one with linz keygen DIR)") from None
    if not isinstance(key, c.Ed25519PrivateKey):
        raise ArtifactError(source, f"a {type(key).__name__.lstrip('_')}; artifacts are signed with Ed25519 keys "
                                    "(make one with linz keygen DIR)")
    return key


def load_public_key(key: str | Path | bytes) -> Any:
    """Read an Ed25519 public key: a PEM file, or PEM text as bytes.

    Parameters
    ----------
    key : str, pathlib.Path or bytes

    Returns
    -------
    cryptography.hazmat.primitives.asymmetric.ed25519.Ed25519PublicKey

    Raises
    ------
    ArtifactError
        The file cannot be read or holds no Ed25519 public key (named by its path).
    ConfigError
        ``cryptography`` is missing.
    """
    c = _crypto("trusted keys")
    source = "trusted key (PEM text)" if isinstance(key, bytes) else f"trusted key {key}"
    try:
        public = c.serialization.load_pem_public_key(_key_text(key, source))
    except (ValueError, TypeError, c.UnsupportedAlgorithm) as err:
        if isinstance(err, ArtifactError):
            raise
        raise ArtifactError(source, "not a PEM public key (linz keygen writes one beside the private key)") \
            from None
    if not isinstance(public, c.Ed25519PublicKey):
        raise ArtifactError(source, f"a {type(public).__name__.lstrip('_')}; artifacts are signed with Ed25519 keys")
    return public


def key_fingerprint(public_key: Any) -> str:
    """SHA-256 (hex) of an Ed25519 public key's raw 32 bytes: how a signature names its key.

    Parameters
    ----------
    public_key : Ed25519PublicKey

    Returns
    -------
    str
    """
    c = _crypto("trusted keys")
    raw = public_key.public_bytes(c.serialization.Encoding.Raw, c.serialization.PublicFormat.Raw)
    return hashlib.sha256(raw).hexdigest()


def _signed_bytes(document: dict[str, Any]) -> bytes:
    return canonical_text(signed_body(document)).encode("ascii")


def sign_document(document: dict[str, Any], private_key: Any) -> dict[str, Any]:
    """The document with its ``signature`` over the covered content (a copy; seal it to write it).

    Parameters
    ----------
    document : dict
        An artifact document (with or without ``sha256``; an old signature is replaced).
    private_key : Ed25519PrivateKey
        From :func:`load_private_key`.

    Returns
    -------
    dict
    """
    value = private_key.sign(_signed_bytes(document))
    signature = {"algorithm": SIGNATURE_ALGORITHM, "public_key_sha256": key_fingerprint(private_key.public_key()),
                 "value": base64.b64encode(value).decode("ascii")}
    return dict(signed_body(document), signature=signature)


def sign_artifact_file(path: str | Path, private_key: Any) -> str:
    """Sign a written artifact in place (its hash is checked first and stays as it was).

    Parameters
    ----------
    path : str or pathlib.Path
    private_key : Ed25519PrivateKey

    Returns
    -------
    str
        The fingerprint of the signing key.

    Raises
    ------
    ArtifactError
        The artifact does not read back or cannot be written.
    """
    path = Path(path)
    document = sign_document(read_document(path), private_key)
    temporary = path.with_name(path.name + ".partial")
    try:
        temporary.write_text(seal(document))
        os.replace(temporary, path)
    except OSError as err:
        raise ArtifactError(str(path), f"cannot write: {err.strerror or err}") from None
    return document["signature"]["public_key_sha256"]


def verify_signature(document: dict[str, Any], trusted_keys: Sequence[str | Path | bytes], source: str) -> str:
    """Check that one of the trusted keys signed the document's covered content.

    Parameters
    ----------
    document : dict
        A document whose hash was checked (:func:`~linz_ros.artifact.document.read_document`).
    trusted_keys : sequence of path or bytes
        Ed25519 public keys, PEM files or PEM text.
    source : str
        The artifact, named in errors.

    Returns
    -------
    str
        ``signed by trusted key <first 16 hex digits of its fingerprint>``.

    Raises
    ------
    ArtifactError
        Unsigned, a malformed signature, a key that is not trusted, or a signature that
        does not match the content; or a trusted key that cannot be read.
    ConfigError
        ``cryptography`` is missing.
    """
    c = _crypto("trusted keys")
    keys = {key_fingerprint(k): k for k in (load_public_key(item) for item in trusted_keys)}
    signature = document.get("signature")
    if signature is None:
        raise ArtifactError(source, "not signed, and only artifacts signed with a trusted key are accepted "
                                    "(sign it with linz build --sign-key)")
    fingerprint, value = _signature_fields(signature, source)
    key = keys.get(fingerprint)
    if key is None:
        trusted = ", ".join(f[:16] for f in keys)
        raise ArtifactError(source, f"signed with key {fingerprint[:16]}, which is not a trusted key "
                                    f"(trusted: {trusted})")
    try:
        key.verify(value, _signed_bytes(document))
    except c.InvalidSignature:
        raise ArtifactError(source, f"the signature by trusted key {fingerprint[:16]} does not match the content: "
                                    "the artifact was changed after it was signed") from None
    return f"signed by trusted key {fingerprint[:16]}"


def _signature_fields(signature: Any, source: str) -> tuple[str, bytes]:
    """The key fingerprint and the raw signature, or a one-line refusal of a malformed field."""
    if not isinstance(signature, dict) or signature.get("algorithm") != SIGNATURE_ALGORITHM:
        raise ArtifactError(source, f"signature: expected a mapping with algorithm {SIGNATURE_ALGORITHM!r}")
    fingerprint, text = signature.get("public_key_sha256"), signature.get("value")
    if not (isinstance(fingerprint, str) and _HEX64.fullmatch(fingerprint)):
        raise ArtifactError(source, "signature.public_key_sha256: expected 64 lowercase hex digits")
    try:
        value = base64.b64decode(text.encode("ascii"), validate=True) if isinstance(text, str) else b""
    except (binascii.Error, UnicodeEncodeError):
        value = b""
    if len(value) != 64:
        raise ArtifactError(source, "signature.value: expected the 64-byte signature in base64")
    return fingerprint, value
