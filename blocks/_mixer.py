"""Complex oscillator and frequency shifting without a transcendental call per sample.

The oscillator ``exp(j 2 pi (phase + f n))`` for ``n = 0 .. count - 1`` is built from a row of
``exp(j 2 pi f r)``, ``r = 0 .. B - 1`` (computed once per frequency) times one phasor per row of
``B`` samples: ``exp(j 2 pi (phase + f B q))`` for row ``q``. Only ``count / B`` exponentials
are evaluated per call; the phase accumulator is kept in float64 cycles, reduced modulo 1, so
it never loses precision on long runs.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["DEFAULT_ROW", "frequency_shift", "oscillator", "tone_row"]

#: Default number of samples per precomputed row.
DEFAULT_ROW = 1024


def tone_row(cycles_per_sample: float, length: int = DEFAULT_ROW) -> np.ndarray:
    """One row of oscillator samples, ``exp(j 2 pi f r)`` for ``r = 0 .. length - 1``.

    Parameters
    ----------
    cycles_per_sample : float
        Normalised frequency ``f = frequency_hz / sample_rate``.
    length : int
        Row length ``B`` (>= 1).

    Returns
    -------
    numpy.ndarray
        complex64 row, marked read-only.

    Notes
    -----
    The angle ``2 pi (f r mod 1)`` is formed in float64 before the exponential so that every
    sample is within float32 rounding of the exact value.
    """
    if length < 1:
        raise ValueError(f"length must be >= 1 (got {length})")
    cycles = np.mod(float(cycles_per_sample) * np.arange(length, dtype=np.float64), 1.0)
    row = np.exp(2j * np.pi * cycles).astype(np.complex64)
    row.setflags(write=False)
    return row


def oscillator(count: int, cycles_per_sample: float, phase: float = 0.0,
               row: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """Samples of a complex exponential that continue exactly from a given phase.

    Parameters
    ----------
    count : int
        Number of samples.
    cycles_per_sample : float
        Normalised frequency ``f`` in cycles per sample (negative shifts down).
    phase : float
        Phase of the first sample in cycles.
    row : numpy.ndarray, optional
        ``tone_row(cycles_per_sample, B)`` precomputed by the caller; built here if omitted.

    Returns
    -------
    samples : numpy.ndarray
        complex64 ``exp(j 2 pi (phase + f n))``, ``n = 0 .. count - 1``.
    next_phase : float
        Phase in cycles (in ``[0, 1)``) of the sample after the last one: pass it as ``phase``
        to the next call for a phase-continuous oscillator.

    Notes
    -----
    ``exp(j 2 pi (phase + f (q B + r))) = exp(j 2 pi (phase + f q B)) * exp(j 2 pi f r)``: the
    row supplies the second factor, one exponential per row the first (the addition theorem of
    the exponential; common practice for table-driven oscillators). The error of every sample
    is a few float32 ulps and does not grow with ``count`` or with the number of calls.
    """
    f = float(cycles_per_sample)
    if row is None:
        row = tone_row(f)
    width = row.shape[0]
    rows = -(-count // width)
    starts = np.mod(phase + f * width * np.arange(rows, dtype=np.float64), 1.0)
    grid = np.empty((rows, width), dtype=np.complex64)
    np.multiply(np.exp(2j * np.pi * starts).astype(np.complex64)[:, None], row[None, :],
                out=grid)
    next_phase = (phase + math.fmod(f * count, 1.0)) % 1.0
    return grid.reshape(-1)[:count], next_phase


def frequency_shift(x: np.ndarray, cycles_per_sample: float, phase: float = 0.0,
                    row: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """Multiply a complex signal by a phase-continuous complex exponential.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 input (read only).
    cycles_per_sample : float
        Shift in cycles per sample: the spectrum moves up by ``f * sample_rate`` Hz.
    phase : float
        Oscillator phase in cycles at ``x[0]`` (0 at the start of a stream).
    row : numpy.ndarray, optional
        Precomputed ``tone_row(cycles_per_sample)``.

    Returns
    -------
    y : numpy.ndarray
        complex64 ``x[n] exp(j 2 pi (phase + f n))``.
    next_phase : float
        Oscillator phase after the last sample, for the next call.

    Notes
    -----
    Feeding a signal in pieces with ``next_phase`` carried gives the same output as feeding it
    whole, to float32 rounding.
    """
    osc, next_phase = oscillator(x.shape[0], cycles_per_sample, phase, row)
    return np.multiply(osc, np.asarray(x, dtype=np.complex64), out=osc), next_phase
