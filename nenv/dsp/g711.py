"""ITU-T G.711 companding (PCMU = mu-law, PCMA = A-law), vectorised.

The segment/step layout follows ITU-T G.711 (11/88), Tables 1 and 2; the bit
manipulations are the classic public-domain formulation of those tables
(16-bit linear in, 8-bit character out, even bits inverted for A-law, all bits
inverted for mu-law).

Sign convention for negative inputs (documented, and checked in tests):
* A-law: the one's-complement rule ``m = (-x - 1) >> 3``, so the mid-riser
  quantiser is symmetric about -0.5 LSB. This is bit-identical to the Python
  standard library's ``audioop.lin2alaw`` for all 65,536 inputs.
* mu-law: sign and magnitude, ``code(-x) == code(x) & 0x7F`` for x in 1..32767
  (and -32768 coded like -32767), i.e. the quantiser is exactly symmetric about
  zero, as G.711's magnitude tables are. ``audioop.lin2ulaw`` instead shifts
  the two's-complement value (rounding negatives away from zero), so for some
  negative inputs it returns the neighbouring code.
"""

from __future__ import annotations

from typing import Literal

import numpy as np

from nenv.media.audio import to_int16
from nenv.errors import InputError

Law = Literal["mulaw", "alaw", "none"]
LAWS = ("mulaw", "alaw", "none")

_MU_BIAS = 0x84 >> 2  # 33, in 14-bit units
_MU_CLIP = 8159  # largest 14-bit magnitude before the bias


def _segment(v: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Index of the first segment end >= v (8 when v exceeds the last end)."""
    return np.searchsorted(ends, v, side="left")


_A_SEG_END = np.array([0x1F, 0x3F, 0x7F, 0xFF, 0x1FF, 0x3FF, 0x7FF, 0xFFF])
_MU_SEG_END = np.array([0x3F, 0x7F, 0xFF, 0x1FF, 0x3FF, 0x7FF, 0xFFF, 0x1FFF])


def alaw_encode(x: np.ndarray) -> np.ndarray:
    """16-bit linear PCM -> A-law characters.

    x : np.ndarray of int16 (or ints in -32768..32767) -> np.ndarray of uint8, same shape
    """
    v = np.asarray(x, dtype=np.int32) >> 3
    neg = v < 0
    mask = np.where(neg, 0x55, 0xD5)
    v = np.where(neg, -v - 1, v)
    seg = _segment(v, _A_SEG_END)
    shift = np.where(seg < 2, 1, seg)
    aval = (np.minimum(seg, 7) << 4) | ((v >> shift) & 0xF)
    aval = np.where(seg >= 8, 0x7F, aval)
    return (aval ^ mask).astype(np.uint8)


def alaw_decode(code: np.ndarray) -> np.ndarray:
    """A-law characters -> 16-bit linear PCM (int16), the mid-point of each step."""
    a = np.asarray(code, dtype=np.int32) ^ 0x55
    t = (a & 0xF) << 4
    seg = (a & 0x70) >> 4
    t = np.where(seg == 0, t + 8, (t + 0x108) << np.maximum(seg - 1, 0))
    return np.where(a & 0x80, t, -t).astype(np.int16)


def mulaw_encode(x: np.ndarray) -> np.ndarray:
    """16-bit linear PCM -> mu-law characters (sign-magnitude, symmetric; see module doc).

    x : np.ndarray of int16 (or ints in -32768..32767) -> np.ndarray of uint8, same shape
    """
    x = np.asarray(x, dtype=np.int32)
    neg = x < 0
    mag = np.minimum(np.abs(x), 32767) >> 2
    mask = np.where(neg, 0x7F, 0xFF)
    mag = np.minimum(mag, _MU_CLIP) + _MU_BIAS
    seg = _segment(mag, _MU_SEG_END)
    uval = (np.minimum(seg, 7) << 4) | ((mag >> (np.minimum(seg, 7) + 1)) & 0xF)
    uval = np.where(seg >= 8, 0x7F, uval)
    return (uval ^ mask).astype(np.uint8)


def mulaw_decode(code: np.ndarray) -> np.ndarray:
    """mu-law characters -> 16-bit linear PCM (int16)."""
    u = ~np.asarray(code, dtype=np.int32) & 0xFF
    t = (((u & 0xF) << 3) + 0x84) << ((u & 0x70) >> 4)
    return np.where(u & 0x80, 0x84 - t, t - 0x84).astype(np.int16)


def encode(y: np.ndarray, *, law: Law) -> np.ndarray:
    """Float samples -> G.711 characters (uint8) for ``law`` 'mulaw' or 'alaw'."""
    if law == "mulaw":
        return mulaw_encode(to_int16(y))
    if law == "alaw":
        return alaw_encode(to_int16(y))
    raise InputError(f"law={law!r} has no G.711 characters: choose 'mulaw' or 'alaw'")


def decode(code: np.ndarray, *, law: Law) -> np.ndarray:
    """G.711 characters -> float samples (full scale 1.0), by a 256-entry table built from the decoders."""
    if law not in _FLOAT_TABLES:
        raise InputError(f"law={law!r} has no G.711 characters: choose 'mulaw' or 'alaw'")
    return _FLOAT_TABLES[law][np.asarray(code, dtype=np.uint8)]


_FLOAT_TABLES = {
    "mulaw": mulaw_decode(np.arange(256)).astype(np.float64) / 32768.0,
    "alaw": alaw_decode(np.arange(256)).astype(np.float64) / 32768.0,
}
for _t in _FLOAT_TABLES.values():
    _t.flags.writeable = False


def compand(y: np.ndarray, *, law: Law) -> np.ndarray:
    """Pass float samples through a G.711 encoder and decoder ('none' rounds to 16 bits only)."""
    if law not in LAWS:
        raise InputError(f"law={law!r} is not known: choose one of {', '.join(LAWS)}")
    if law == "none":
        return to_int16(y).astype(np.float64) / 32768.0
    return decode(encode(y, law=law), law=law)
