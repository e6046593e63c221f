"""Optional Ed25519 signatures on ledger lines (the ``cryptography`` package).

With ``ledger.signing_key`` in the config, every ledger line carries ``sig``: the Ed25519 signature of its
hash. The audit verifies each line against a public key — the one the auditor brings (``holdfast audit
--public-key``) or else the one recorded at the seal — and names every unsigned or wrongly signed line by its
sequence number. A forger who rewrites lines without the private key cannot sign them; signing cannot show
that lines were cut off the end of the ledger (the receipt's anchored head does that).
"""

from __future__ import annotations

import base64
import os
from pathlib import Path
from typing import Any

from .errors import ConfigError, LedgerError


def load_private_key(path: str | os.PathLike[str]) -> Any:
    """Read an unencrypted PEM Ed25519 private key; LedgerError naming the file when it is not one."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import load_pem_private_key

    try:
        key = load_pem_private_key(Path(path).read_bytes(), password=None)
    except (OSError, ValueError, TypeError) as exc:
        raise LedgerError(f"signing key '{path}' cannot be read as an unencrypted PEM private key ({exc}); "
                          "restore it (ledger lines cannot be signed without it)") from exc
    if not isinstance(key, Ed25519PrivateKey):
        raise LedgerError(f"signing key '{path}' is not an Ed25519 key; make one with 'openssl genpkey -algorithm "
                          "ed25519'")
    return key


def public_key_text(private_key: Any) -> str:
    """The raw public key, base64 (what the seal records)."""
    from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

    raw = private_key.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)
    return base64.b64encode(raw).decode("ascii")


def read_public_key(path: str | os.PathLike[str]) -> str:
    """A PEM public key file (or a private key file: its public half), as raw base64."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
    from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat, load_pem_public_key

    data = Path(path).read_bytes()
    try:
        key = load_pem_public_key(data)
    except ValueError:
        return public_key_text(load_private_key(path))
    if not isinstance(key, Ed25519PublicKey):
        raise ConfigError(f"public key '{path}' is not an Ed25519 key; pass the key the experiment was signed with")
    return base64.b64encode(key.public_bytes(Encoding.Raw, PublicFormat.Raw)).decode("ascii")


def sign(private_key: Any, line_hash: str) -> str:
    """Signature of a line's hash, base64."""
    return base64.b64encode(private_key.sign(line_hash.encode("ascii"))).decode("ascii")


def verify(public_key_b64: str, line_hash: str, signature_b64: str) -> bool:
    """True when the signature is the key's signature of this hash."""
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    try:
        key = Ed25519PublicKey.from_public_bytes(base64.b64decode(public_key_b64))
        key.verify(base64.b64decode(signature_b64), line_hash.encode("ascii"))
    except (InvalidSignature, ValueError, TypeError):
        return False
    return True


def check_key_location(path: str, results: Path) -> None:
    """The private key must exist and must not live inside the results folder (which is shared for review)."""
    where = Path(path).resolve()
    if not where.is_file():
        raise ConfigError(f"config key 'ledger.signing_key': '{path}' does not exist; make a key with 'openssl "
                          "genpkey -algorithm ed25519 -out KEY.pem' and keep it outside results/")
    if where.is_relative_to(results.resolve()):
        raise ConfigError(f"config key 'ledger.signing_key': '{path}' lies inside the results folder; keep the key "
                          "where readers of the results cannot take it")
