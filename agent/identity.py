"""Identifiers derived from public keys, shared by the device and the researcher side."""

from __future__ import annotations

import hashlib

from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

__all__ = ["device_key_id"]


def device_key_id(public_key: Ed25519PublicKey | bytes) -> str:
    """First 16 hex digits of SHA-256 of the raw 32-byte Ed25519 public key.

    Parameters
    ----------
    public_key : Ed25519PublicKey or bytes
        The key, or its raw 32 bytes (RFC 8032 encoding).
    """
    if isinstance(public_key, (bytes, bytearray)):
        if len(public_key) != 32:
            raise ValueError(f"device_key_id: expected a raw Ed25519 public key of 32 bytes, "
                             f"got {len(public_key)} bytes")
        raw = bytes(public_key)
    elif isinstance(public_key, Ed25519PublicKey):
        raw = public_key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    else:
        raise TypeError(f"device_key_id: expected an Ed25519 public key or its 32 raw bytes, "
                        f"got {type(public_key).__name__}")
    return hashlib.sha256(raw).hexdigest()[:16]
