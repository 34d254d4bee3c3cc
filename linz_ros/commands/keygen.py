"""``linz keygen``: an Ed25519 key pair for signing artifacts."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

__all__ = ["KeyPair", "keygen", "render_keygen"]


@dataclass
class KeyPair:
    """The two PEM files written and the public key's fingerprint (SHA-256, hex)."""

    private: Path
    public: Path
    fingerprint: str


def keygen(folder: str | Path) -> KeyPair:
    """Write a private key (mode 0600) and its public key into a folder (existing keys are kept).

    Parameters
    ----------
    folder : str or pathlib.Path

    Returns
    -------
    KeyPair

    Raises
    ------
    LinzError
    """
    from linz_ros.artifact.signing import generate_keys, key_fingerprint, load_public_key

    private, public = generate_keys(folder)
    return KeyPair(Path(private), Path(public), key_fingerprint(load_public_key(public)))


def render_keygen(keys: KeyPair) -> str:
    """What ``linz keygen`` prints: where each key went and what it is for.

    Parameters
    ----------
    keys : KeyPair

    Returns
    -------
    str
    """
    return (f"wrote {keys.private} (private: keep it on the build machine; linz build --sign-key {keys.private})\n"
            f"wrote {keys.public} (public, key {keys.fingerprint[:16]}: give it to the robots, "
            "parameter trusted_keys, or --trusted-key)")
