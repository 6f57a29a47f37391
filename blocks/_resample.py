"""Sample-clock error: replay a stream as if its sampling clock ran fast or slow by some ppm.

Output sample ``n`` is the input at the time ``t_n = n (1 + ppm 1e-6)`` input samples, read off
a band-limited interpolation of the input (a Kaiser-windowed sinc held as a polyphase table).
A positive ``ppm`` walks through the input faster than one sample per sample: the output has
``1 / (1 + ppm 1e-6)`` samples per input sample, so symbols arrive faster (fewer samples per
symbol), as from a transmitter whose clock runs ``ppm`` fast.

The ratio is held exactly as ``(D + delta) / D`` with ``D = 10**12``, and ``t_n`` as its
integer part and the integer remainder modulo ``D``, so no rounding accumulates however long
the run, and the output does not depend on how the input is cut into chunks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "MAX_CLOCK_PPM",
    "Resampler",
    "ResamplerState",
    "design_resampler",
    "resample",
    "resample_tail",
    "resampled_index",
]

#: Largest clock error accepted (exclusive), ppm.
MAX_CLOCK_PPM = 1e4
#: Denominator of the exact ratio: the clock error is resolved to 1e-6 ppm.
_DENOMINATOR = 10**12
#: Interpolator length (taps), Kaiser shape parameter and table rows per input sample.
_TAPS = 16
_BETA = 8.0
_PHASES = 512


@dataclass(frozen=True)
class Resampler:
    """A designed clock error (see :func:`design_resampler`)."""

    clock_ppm: float
    #: ``(DENOMINATOR + delta) / DENOMINATOR`` input samples per output sample.
    delta: int
    #: float32 ``(taps, phases + 1)``: column ``p`` holds the taps for the fraction
    #: ``p / phases``.
    table: np.ndarray = field(repr=False)
    #: float32 ``(taps, phases)``: the change of each tap from one column to the next.
    steps: np.ndarray = field(repr=False)

    @property
    def ratio(self) -> float:
        """Input samples per output sample, ``1 + clock_ppm 1e-6`` (as realised)."""
        return 1.0 + self.delta / _DENOMINATOR

    @property
    def before(self) -> int:
        """Input samples the interpolator reaches before ``floor(t_n)``."""
        return self.table.shape[0] // 2 - 1

    @property
    def after(self) -> int:
        """Input samples the interpolator reaches after ``floor(t_n)``."""
        return self.table.shape[0] // 2


@dataclass(frozen=True)
class ResamplerState:
    """Progress of a resampler through its stream, carried from one call to the next.

    Attributes
    ----------
    next_output : int
        Absolute index of the next output sample.
    inputs : int
        Input samples received so far.
    held : numpy.ndarray
        complex64 input samples ``held_start ..`` still needed by later outputs.
    held_start : int
        Absolute input index of ``held[0]`` (negative at the start: zeros before the stream).
    """

    next_output: int
    inputs: int
    held: np.ndarray = field(repr=False)
    held_start: int


def _kaiser_sinc(t: np.ndarray, half: int, beta: float) -> np.ndarray:
    """``sinc(t)`` under a Kaiser window spanning ``|t| <= half``."""
    shape = np.sqrt(np.clip(1.0 - (t / half) ** 2, 0.0, None))
    return np.sinc(t) * np.i0(beta * shape) / np.i0(beta)


def design_resampler(clock_ppm: float) -> Resampler:
    """Check a clock error and build its interpolator.

    Parameters
    ----------
    clock_ppm : float
        Clock error in parts per million, ``|clock_ppm| < 1e4``; positive means the signal's
        clock runs fast (its symbols arrive faster).

    Returns
    -------
    Resampler

    Notes
    -----
    The interpolator evaluates ``sum_d x[m + d] h(d - mu)`` over ``d = -7 .. 8`` at
    ``t = m + mu``, with ``h`` the ideal band-limited interpolator ``sinc`` under a Kaiser
    window [1]_ of half-width 8 and ``beta = 8``, each set of taps scaled to unit sum (unit
    gain at DC). The taps are tabulated at 512 fractions per sample and interpolated
    linearly between adjacent columns, the arbitrary-ratio polyphase structure of [2]_ and
    [3]_ (both cited from memory, no equation numbers). At ``mu = 0`` it returns ``x[m]``
    exactly. Measured on complex tones (error magnitude relative to the tone, worst over
    the fraction): below -90 dB for ``|f| <= fs / 8``, below -78 dB for ``|f| <= fs / 4``
    and about -57 dB at ``|f| = 0.35 fs``; signals reaching closer to ``fs / 2`` are not
    served.

    References
    ----------
    .. [1] J. F. Kaiser, "Nonrecursive digital filter design using the I0-sinh window
       function", Proc. IEEE Int. Symp. Circuits and Systems, 20-23, 1974.
    .. [2] R. E. Crochiere and L. R. Rabiner, Multirate Digital Signal Processing,
       Prentice-Hall, 1983 (polyphase filters for arbitrary conversion ratios).
    .. [3] J. O. Smith and P. Gossett, "A flexible sampling-rate conversion method", Proc.
       IEEE ICASSP, 112-115, 1984.
    """
    if not (math.isfinite(clock_ppm) and abs(clock_ppm) < MAX_CLOCK_PPM):
        raise ValueError(f"clock_ppm must be a finite number of magnitude below "
                         f"{MAX_CLOCK_PPM:g} (got {clock_ppm!r})")
    half = _TAPS // 2
    mu = np.arange(_PHASES + 1) / _PHASES
    d = np.arange(-(half - 1), half + 1)
    taps = _kaiser_sinc(d[:, None] - mu[None, :], half, _BETA)
    taps /= taps.sum(axis=0)
    table = taps.astype(np.float32)
    steps = np.diff(table, axis=1)
    for arr in (table, steps):
        arr.setflags(write=False)
    return Resampler(float(clock_ppm), round(clock_ppm * (_DENOMINATOR // 10**6)), table,
                     steps)


def _initial_state(rs: Resampler) -> ResamplerState:
    return ResamplerState(0, 0, np.zeros(rs.before, np.complex64), -rs.before)


def _outputs_before(rs: Resampler, time: int) -> int:
    """Number of outputs ``n >= 0`` whose time ``t_n`` is below the input index ``time``."""
    num = _DENOMINATOR + rs.delta
    return max(0, -(-(time * _DENOMINATOR) // num))


def _interpolate(rs: Resampler, buf: np.ndarray, buf_start: int, first: int,
                 stop: int) -> tuple[np.ndarray, int]:
    """Outputs ``first .. stop - 1`` from input ``buf`` (absolute start ``buf_start``).

    Also returns ``floor(t_stop)``, the integer part of the next output's time.
    """
    num = _DENOMINATOR + rs.delta
    q0, r0 = divmod(first * num, _DENOMINATOR)          # exact, Python integers
    j = np.arange(stop - first, dtype=np.int64)
    excess, rem = np.divmod(r0 + j * rs.delta, _DENOMINATOR)
    index = (q0 - buf_start - rs.before) + j + excess    # first tap's index into buf
    row = rem * (_PHASES / _DENOMINATOR)
    p = row.astype(np.int64)
    a = (row - p).astype(np.float32)
    y = np.zeros(stop - first, np.complex64)
    for k, (taps, steps) in enumerate(zip(rs.table, rs.steps, strict=True)):
        y += (taps[p] + a * steps[p]) * buf[index + k]
    return y, (stop * num) // _DENOMINATOR


def resample(x: np.ndarray, rs: Resampler, state: ResamplerState | None = None,
             ) -> tuple[np.ndarray, ResamplerState]:
    """Resample the next piece of a stream.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 input samples, continuing the stream.
    rs : Resampler
        From :func:`design_resampler`.
    state : ResamplerState or None
        The state returned by the previous call; None at the start of the stream.

    Returns
    -------
    y : numpy.ndarray
        complex64 output samples ``state.next_output ..``: every output whose interpolator
        window lies within the input received so far (the last few wait for more input or
        for :func:`resample_tail`).
    state : ResamplerState
        Continue with it.
    """
    if state is None:
        state = _initial_state(rs)
    x = np.asarray(x, dtype=np.complex64)
    inputs = state.inputs + x.shape[0]
    buf = np.concatenate([state.held, x])
    # Output n is ready when floor(t_n) + after <= inputs - 1, i.e. t_n < inputs - after.
    stop = max(state.next_output, _outputs_before(rs, inputs - rs.after))
    y, base = _interpolate(rs, buf, state.held_start, state.next_output, stop)
    keep = base - rs.before
    held = buf[keep - state.held_start:].copy()
    return y, ResamplerState(stop, inputs, held, keep)


def resample_tail(rs: Resampler, state: ResamplerState | None) -> np.ndarray:
    """The outputs still held back at the end of the stream (input zero beyond its end).

    Parameters
    ----------
    rs : Resampler
        From :func:`design_resampler`.
    state : ResamplerState or None
        The state after the last :func:`resample` call (None: the stream was empty).

    Returns
    -------
    numpy.ndarray
        complex64 outputs up to the last one whose time lies within the input, so that a
        stream of ``N`` input samples gives ``ceil(N / ratio)`` outputs in all.
    """
    if state is None:
        return np.zeros(0, np.complex64)
    buf = np.concatenate([state.held, np.zeros(rs.after + 2, np.complex64)])
    stop = max(state.next_output, _outputs_before(rs, state.inputs))
    return _interpolate(rs, buf, state.held_start, state.next_output, stop)[0]


def resampled_index(rs: Resampler, index: int) -> int:
    """Index of the first output sample at or after input sample ``index``.

    Parameters
    ----------
    rs : Resampler
        From :func:`design_resampler`.
    index : int
        Absolute input sample index (an annotation's, say).

    Returns
    -------
    int
        ``ceil(index / ratio)``, exact.
    """
    return _outputs_before(rs, int(index))
