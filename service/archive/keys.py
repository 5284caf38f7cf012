"""The laboratory's Ed25519 key (RFC 8032): signing, the public half, and the ring of keys an
archive trusts when it verifies (the current one and those used before a key rotation)."""

from __future__ import annotations

import logging
import os
from collections.abc import Iterable
from pathlib import Path

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)

from service.archive.errors import ArchiveError
from service.storage import sha256_hex

logger = logging.getLogger("service.archive")


class LabKey:
    """The laboratory's Ed25519 signing key (RFC 8032), kept in the instance folder."""

    PRIVATE_NAME = "lab_ed25519_private.pem"
    PUBLIC_NAME = "lab_ed25519_public.pem"

    def __init__(self, private_key: Ed25519PrivateKey) -> None:
        self._private = private_key
        self.public_raw: bytes = private_key.public_key().public_bytes(
            serialization.Encoding.Raw, serialization.PublicFormat.Raw
        )
        self.key_id: str = key_id_of(self.public_raw)

    @classmethod
    def load_or_create(cls, key_dir: str | os.PathLike[str]) -> LabKey:
        """Load the lab key, creating it (readable by the owner only) on first start."""
        key_dir = Path(key_dir)
        key_dir.mkdir(parents=True, exist_ok=True)
        private_path = key_dir / cls.PRIVATE_NAME
        if private_path.exists():
            loaded = serialization.load_pem_private_key(private_path.read_bytes(), password=None)
            if not isinstance(loaded, Ed25519PrivateKey):
                raise ArchiveError(f"{private_path} does not hold an Ed25519 private key")
            key = cls(loaded)
        else:
            key = cls(Ed25519PrivateKey.generate())
            pem = key._private.private_bytes(
                serialization.Encoding.PEM,
                serialization.PrivateFormat.PKCS8,
                serialization.NoEncryption(),
            )
            _write_exclusive(private_path, pem, mode=0o600)
            logger.info("created lab signing key %s in %s", key.key_id, key_dir)
        public_path = key_dir / cls.PUBLIC_NAME
        if not public_path.exists():
            _write_exclusive(public_path, key.public_pem().encode("ascii"), mode=0o644)
        return key

    def sign(self, data: bytes) -> str:
        return self._private.sign(data).hex()

    def public_pem(self) -> str:
        return (
            self._private.public_key()
            .public_bytes(
                serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
            )
            .decode("ascii")
        )

    def public_info(self) -> dict[str, str]:
        return {
            "algorithm": "Ed25519",
            "key_id": self.key_id,
            "public_key_hex": self.public_raw.hex(),
            "public_key_pem": self.public_pem(),
        }

    @classmethod
    def load_for_reading(cls, key_dir: str | os.PathLike[str]) -> LabKey | PublicLabKey:
        """The lab key of a read-only archive copy: the private key if the copy has it, else
        only the public key (all that verifying needs); nothing is created."""
        key_dir = Path(key_dir)
        private_path = key_dir / cls.PRIVATE_NAME
        if private_path.is_file():
            loaded = serialization.load_pem_private_key(private_path.read_bytes(), password=None)
            if isinstance(loaded, Ed25519PrivateKey):
                return cls(loaded)
        public_path = key_dir / cls.PUBLIC_NAME
        if not public_path.is_file():
            raise ArchiveError(
                f"{key_dir} holds neither the lab's private nor its public key "
                f"({cls.PUBLIC_NAME}); verification needs the public key"
            )
        public = serialization.load_pem_public_key(public_path.read_bytes())
        if not isinstance(public, Ed25519PublicKey):
            raise ArchiveError(f"{public_path} does not hold an Ed25519 public key")
        return PublicLabKey(public)


class PublicLabKey:
    """The lab's public key alone: verifies, never signs (a read-only archive copy)."""

    def __init__(self, public: Ed25519PublicKey) -> None:
        self._public = public
        self.public_raw: bytes = public.public_bytes(
            serialization.Encoding.Raw, serialization.PublicFormat.Raw
        )
        self.key_id: str = key_id_of(self.public_raw)

    def sign(self, data: bytes) -> str:
        raise ArchiveError("this archive copy is open read-only and holds no signing key", 503)

    def public_pem(self) -> str:
        return self._public.public_bytes(
            serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
        ).decode("ascii")

    public_info = LabKey.public_info


def key_id_of(public_raw: bytes) -> str:
    """A key's short name: the first 16 hex digits of its public key's SHA-256."""
    return sha256_hex(public_raw)[:16]


def _write_exclusive(path: Path, data: bytes, mode: int) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    with os.fdopen(fd, "wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())


def verify_signature(public_raw: bytes, data: bytes, signature_hex: str) -> bool:
    """True if ``signature_hex`` is a valid Ed25519 signature of ``data`` (RFC 8032 5.1.7)."""
    try:
        public = Ed25519PublicKey.from_public_bytes(public_raw)
    except ValueError:
        return False
    return signature_ok(public, data, signature_hex)


def signature_ok(public: Ed25519PublicKey, data: bytes, signature_hex: str) -> bool:
    try:
        public.verify(bytes.fromhex(signature_hex), data)
    except (InvalidSignature, ValueError):
        return False
    return True


class KeyRing:
    """The public keys an archive accepts, by key id: its own lab key and any the lab used
    before a key rotation, which still verify their old entries."""

    def __init__(self, key: LabKey | PublicLabKey | None, trusted: Iterable[bytes] = ()) -> None:
        #: key id -> raw public key
        self.raw: dict[str, bytes] = {key.key_id: key.public_raw} if key is not None else {}
        for public_raw in trusted:
            self.raw[key_id_of(public_raw)] = public_raw
        self._objects: dict[str, Ed25519PublicKey] = {}

    def public(self, key_id: str) -> Ed25519PublicKey | None:
        """The public key named ``key_id``, or None if this archive does not know it."""
        public = self._objects.get(key_id)
        if public is None and key_id in self.raw:
            public = Ed25519PublicKey.from_public_bytes(self.raw[key_id])
            self._objects[key_id] = public
        return public

    def verifies(self, key_id: str, data: bytes, signature_hex: str) -> bool:
        public = self.public(key_id)
        return public is not None and signature_ok(public, data, signature_hex)
