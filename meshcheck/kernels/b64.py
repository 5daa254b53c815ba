"""Compiled base64 encoder (RFC 4648 section 4: the standard alphabet ``A-Z a-z 0-9 + /``
with ``=`` padding, no line breaks) for the uncompressed VTU writer (:mod:`meshcheck.vtkxml`).

``binascii.b2a_base64`` (the reference, tested equal byte for byte) holds the GIL, so
the pieces of a large array cannot be encoded on several cores; :func:`encode_into`
releases it.  It is table-driven: every 3 input bytes are one 24-bit group whose two
12-bit halves index :data:`PAIRS`, a table of the 4096 two-character pairs, so one step
reads 3 bytes and stores 4 characters as two 16-bit words.
"""
from __future__ import annotations

import numpy as np

from . import njit

__all__ = ["ALPHABET", "PAIRS", "encoded_length", "encode_into", "encode"]

#: the 64 characters of the standard base64 alphabet, uint8 (64,)
ALPHABET = np.frombuffer(b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/",
                         np.uint8).copy()


def _pairs() -> np.ndarray:
    """uint16 (4096,): entry v holds the characters of the 6-bit values v >> 6 and v & 63,
    in memory order (a native uint16 view of the two bytes, so any byte order works)."""
    v = np.arange(4096)
    two = np.empty((4096, 2), np.uint8)
    two[:, 0] = ALPHABET[v >> 6]
    two[:, 1] = ALPHABET[v & 63]
    return two.view(np.uint16).reshape(-1)


#: the 4096 two-character pairs of 12-bit values, uint16 (4096,)
PAIRS = _pairs()


def encoded_length(n: int) -> int:
    """Characters in the base64 text of ``n`` bytes (padding included): 4 * ceil(n / 3)."""
    return 4 * ((n + 2) // 3)


@njit
def encode_into(src, out, pairs, alphabet):
    """Base64 of ``src`` uint8 (n,) into ``out`` uint8 (>= 4 * ceil(n / 3),) as ASCII codes;
    ``pairs`` is :data:`PAIRS`, ``alphabet`` :data:`ALPHABET`.  Returns the characters
    written.  ``out`` must hold them (checked: ValueError otherwise)."""
    n = src.shape[0]
    groups = n // 3
    rest = n - 3 * groups
    total = 4 * groups + (4 if rest else 0)
    if out.shape[0] < total:
        raise ValueError("base64 output buffer too short")
    words = out[:4 * groups].view(np.uint16)
    for k in range(groups):
        i = 3 * k
        v = (np.uint32(src[i]) << 16) | (np.uint32(src[i + 1]) << 8) | np.uint32(src[i + 2])
        words[2 * k] = pairs[v >> 12]
        words[2 * k + 1] = pairs[v & 4095]
    if rest:  # the last 1 or 2 bytes: 2 or 3 characters, then "=" padding
        i = 3 * groups
        j = 4 * groups
        v = np.uint32(src[i]) << 16
        if rest == 2:
            v |= np.uint32(src[i + 1]) << 8
        out[j] = alphabet[v >> 18]
        out[j + 1] = alphabet[(v >> 12) & 63]
        out[j + 2] = alphabet[(v >> 6) & 63] if rest == 2 else 61  # "="
        out[j + 3] = 61  # "="
    return total


def encode(src, out: np.ndarray | None = None) -> np.ndarray:
    """Base64 of the bytes of ``src`` (any contiguous array or bytes-like) as uint8 ASCII
    codes, (4 * ceil(n / 3),); written into ``out`` (then a view of it) when given."""
    raw = np.frombuffer(src, np.uint8) if not isinstance(src, np.ndarray) \
        else np.ascontiguousarray(src).reshape(-1).view(np.uint8)
    if raw.flags.writeable:  # one compiled signature (read-only input) for every source
        raw = raw.view()
        raw.flags.writeable = False
    if out is None:
        out = np.empty(encoded_length(len(raw)), np.uint8)
    return out[:encode_into(raw, out, PAIRS, ALPHABET)]
