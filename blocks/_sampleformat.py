"""Sample formats of recordings: SigMF datatype names and the one integer-to-float rule.

Every path that turns stored integers into floats (bare files, SigMF recordings, and later radio
drivers that hand over integers) uses ``decode_samples``; every path that stores floats as
integers uses ``encode_samples``, its exact inverse up to rounding. The rule:

- signed N-bit integer ``v`` (``ci8``, ``ci16_le``, ``ci32_le``): ``x = v / 2**(N-1)``, so
  ``ci8`` is ``v / 128`` and ``ci16`` is ``v / 32768``; the most negative code is -1.0 and
  the most positive one LSB short of +1.0 (two's-complement full scale, common practice);
- unsigned N-bit integer (``cu8``, ``cu16_le``, ``cu32_le``): offset binary around the middle
  of the code range, ``x = (v - m) / m`` with ``m = (2**N - 1) / 2``, so ``cu8`` is
  ``(v - 127.5) / 127.5``: codes 0 and 255 map to -1.0 and +1.0 and the mid-scale DC bias of an
  8-bit converter reads as zero (common practice for 8-bit SDR dongles);
- floating point (``cf32_le``, ``cf64_le``, ...) is taken as it is.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

__all__ = ["SampleFormat", "decode_samples", "encode_samples", "parse_datatype"]

# SigMF specification, "Dataset Format": (r|c)(f32|f64|i32|i16|u32|u16|i8|u8)(_le|_be)?
_DATATYPE = re.compile(
    r"^(?P<cplx>[rc])(?P<kind>f32|f64|i32|i16|u32|u16|i8|u8)(?:_(?P<order>le|be))?$")


@dataclass(frozen=True)
class SampleFormat:
    """How one sample is stored, parsed from a SigMF datatype name.

    Parameters
    ----------
    name : str
        The SigMF datatype, e.g. ``"ci16_le"``.
    is_complex : bool
        IQ pairs (``c``) or real values (``r``).
    kind : str
        ``"f"`` floating point, ``"i"`` signed integer, ``"u"`` unsigned integer.
    bits : int
        Bits per component (8, 16, 32 or 64).
    byteorder : str
        ``"<"`` little-endian, ``">"`` big-endian (``"|"`` for one-byte components).
    """

    name: str
    is_complex: bool
    kind: str
    bits: int
    byteorder: str

    @property
    def component(self) -> np.dtype:
        """numpy dtype of one stored component (I, Q or a real value)."""
        return np.dtype(f"{self.byteorder}{self.kind}{self.bits // 8}")

    @property
    def components(self) -> int:
        """Components per sample: 2 for IQ, 1 for real."""
        return 2 if self.is_complex else 1

    @property
    def sample_bytes(self) -> int:
        """Bytes per stored sample."""
        return self.components * self.bits // 8

    @property
    def output(self) -> str:
        """The stream dtype name the samples travel as: complex64 or float32."""
        return "complex64" if self.is_complex else "float32"

    @property
    def scale(self) -> tuple[float, float]:
        """``(center, half_range)`` of the integer rule ``x = (v - center) / half_range``."""
        if self.kind == "i":
            return 0.0, float(2 ** (self.bits - 1))
        if self.kind == "u":
            half = (2 ** self.bits - 1) / 2
            return half, half
        return 0.0, 1.0


def parse_datatype(name: str) -> SampleFormat:
    """Parse a SigMF datatype name.

    Parameters
    ----------
    name : str
        ``cf32_le``, ``ci16_le``, ``ci8``, ``cu8``, ``rf32_le``, ... Multi-byte types need the
        ``_le`` or ``_be`` suffix; one-byte types take none (a suffix is accepted and moot).

    Returns
    -------
    SampleFormat

    Raises
    ------
    ValueError
        For a name outside the SigMF grammar, naming the name.

    References
    ----------
    .. [1] The SigMF specification, v1.2, section "Dataset Format" (``core:datatype``).
    """
    match = _DATATYPE.match(name) if isinstance(name, str) else None
    if match is None:
        raise ValueError(f"datatype must be a SigMF datatype such as cf32_le, ci16_le, ci8 or cu8 "
                         f"(got {name!r})")
    kind, bits = match["kind"][0], int(match["kind"][1:])
    if bits == 8:
        order = "|"
    elif match["order"] is None:
        raise ValueError(f"datatype {name!r} needs a byte order: {name}_le or {name}_be")
    else:
        order = "<" if match["order"] == "le" else ">"
    return SampleFormat(name, match["cplx"] == "c", kind, bits, order)


def decode_samples(stored: np.ndarray, fmt: SampleFormat) -> np.ndarray:
    """Turn stored components into stream samples (complex64 IQ or float32 real).

    Parameters
    ----------
    stored : numpy.ndarray
        Components as stored, dtype ``fmt.component``, interleaved I, Q for complex formats
        (length a multiple of ``fmt.components``). Not modified.
    fmt : SampleFormat
        The stored format.

    Returns
    -------
    numpy.ndarray
        A new complex64 (IQ) or float32 (real) array, one element per sample.

    Notes
    -----
    Integers follow the module's rule: signed ``v / 2**(N-1)``, unsigned ``(v - m) / m`` with
    ``m = (2**N - 1) / 2`` (common practice; see the module docstring). 8- and 16-bit codes are
    exact in float32; 32-bit codes are scaled in float64 and rounded once to float32.
    """
    if fmt.kind == "f":
        values = stored.astype(np.float32)
    else:
        center, half = fmt.scale
        work = np.float64 if fmt.bits > 16 else np.float32
        values = stored.astype(work)
        if center:
            values -= work(center)
        values /= work(half)
        values = values.astype(np.float32, copy=False)
    return values.view(np.complex64) if fmt.is_complex else values


def encode_samples(samples: np.ndarray, fmt: SampleFormat) -> tuple[np.ndarray, int, int]:
    """Turn stream samples into stored components, the inverse of ``decode_samples``.

    Parameters
    ----------
    samples : numpy.ndarray
        complex64 samples for a complex format, float32 for a real one. Not modified.
    fmt : SampleFormat
        The format to store.

    Returns
    -------
    stored : numpy.ndarray
        Components of dtype ``fmt.component``, I and Q interleaved for complex formats.
    clipped : int
        Samples with a component outside the integer range (written as the nearest code).
    nonfinite : int
        Samples with a NaN or infinite component. Integer formats store NaN as the code of 0.0
        (infinities clip, and count as clipped too); float formats store them as they are.

    Notes
    -----
    Integers: ``v = round(x * half + center)`` (round half to even), then clipped to the
    code range; decoding gives back ``x`` within half a quantisation step ``1 / half``.
    """
    flat = np.ascontiguousarray(samples).view(np.float32)
    per_sample = flat.reshape(-1, fmt.components)
    bad = ~np.isfinite(per_sample)
    nonfinite = int(bad.any(axis=1).sum())
    if fmt.kind == "f":
        return flat.astype(fmt.component), 0, nonfinite
    center, half = fmt.scale
    info = np.iinfo(fmt.component)
    work = np.float64 if fmt.bits > 16 else np.float32
    codes = np.rint(flat.astype(work) * work(half) + work(center))
    if nonfinite:
        codes[np.isnan(codes)] = np.rint(center)
    outside = (codes < info.min) | (codes > info.max)
    clipped = int(outside.reshape(-1, fmt.components).any(axis=1).sum())
    np.clip(codes, info.min, info.max, out=codes)
    return codes.astype(fmt.component), clipped, nonfinite
