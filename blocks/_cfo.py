"""Feedforward carrier frequency offset estimation by lag autocorrelation (delay and multiply).

For a signal ``s[n] exp(j 2 pi f n / fs)`` whose own autocorrelation ``E[s[n] s*[n - L]]`` is
real and positive at the lag ``L``, the angle of ``sum x[n] x*[n - L]`` is ``2 pi f L / fs``
whatever the data. This holds for on-off keying and for DBPSK / pi/4-DQPSK with real pulses
(zero-mean, uncorrelated symbols: the autocorrelation is that of the real pulse), and for
2-FSK with equiprobable tones at ``+/- deviation`` (the phase step over the lag is symmetric,
so its mean phasor is real) as long as ``2 pi deviation L / fs < pi / 2``.

Noise would bias the angle towards zero if its own correlation at lag ``L`` were not zero. The
estimator therefore looks at the input through a root-raised-cosine prefilter designed for a
"symbol" of exactly ``L`` samples: its squared magnitude is a raised-cosine (Nyquist) spectrum,
so white input noise comes out uncorrelated at lag ``L``, while the signal and the largest
offset to be handled lie inside its flat passband.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from blocks._fir import FirState, fir_filter
from blocks._pulses import rrc_taps
from blocks._scratch import work_array
from blocks._windows import WindowState, sum_windows

__all__ = [
    "CorrelatorState",
    "LagDesign",
    "design_lag_estimator",
    "offset_from_correlation",
    "windowed_lag_correlation",
]

#: Roll-off of the estimator's prefilter (the project's choice).
PREFILTER_ROLLOFF = 0.25
#: Prefilter length in multiples of the lag.
PREFILTER_SPAN = 8
# Largest phase step of an FSK tone over the lag: keeps cos() of it >= 1/2.
_MAX_TONE_TURN = math.pi / 3


@dataclass(frozen=True)
class LagDesign:
    """A designed lag-correlation estimator.

    Attributes
    ----------
    lag : int
        Correlation lag ``L`` in samples.
    taps : numpy.ndarray
        float32 prefilter taps (a single 1 when ``L == 1``: no prefilter).
    sample_rate : float
        Input sample rate in Hz.
    """

    lag: int
    taps: np.ndarray
    sample_rate: float

    @property
    def unambiguous_hz(self) -> float:
        """Offsets with ``|f| < sample_rate / (2 L)`` are estimated without wrapping."""
        return self.sample_rate / (2.0 * self.lag)

    @property
    def passband_hz(self) -> float:
        """Half-width of the prefilter's flat passband (``fs (1 - b) / (2 L)``)."""
        if self.lag == 1:
            return self.sample_rate / 2.0
        return self.sample_rate * (1.0 - PREFILTER_ROLLOFF) / (2.0 * self.lag)


def design_lag_estimator(sample_rate: float, symbol_rate: float, max_offset_hz: float,
                         deviation_hz: float = 0.0, occupied_hz: float | None = None,
                         ) -> LagDesign:
    """Choose the lag and the prefilter for a signal and the largest offset to handle.

    Parameters
    ----------
    sample_rate : float
        Input sample rate in Hz.
    symbol_rate : float
        Symbol rate in Hz.
    max_offset_hz : float
        Largest carrier offset (magnitude) to be estimated, > 0.
    deviation_hz : float
        2-FSK peak deviation (0 for amplitude and phase keyings).
    occupied_hz : float, optional
        Half-width of the signal's spectrum without offset. Default ``symbol_rate`` without
        deviation (root-raised-cosine pulses of any roll-off, the main lobe of rectangular
        pulses) and ``deviation_hz + symbol_rate / 2`` for FSK (Carson's rule, common
        practice).

    Returns
    -------
    LagDesign

    Notes
    -----
    The lag is the largest integer ``L`` for which the prefilter's flat passband
    ``fs (1 - b) / (2 L)`` still holds ``occupied_hz + max_offset_hz``, and, for FSK, for which
    a tone turns by at most pi/3 over the lag. A longer lag gives a smaller variance (the
    angle grows with ``L`` while the noise does not) at the price of a smaller unambiguous
    range ``fs / (2 L)``, which the passband condition keeps above ``max_offset_hz``. This is
    the delay-and-multiply frequency estimator of [1]_ (chapter 3, non-data-aided frequency
    recovery with a prefilter wider than signal plus offset); the lag choice and the Nyquist
    prefilter are this project's.

    References
    ----------
    .. [1] U. Mengali and A. N. D'Andrea, Synchronization Techniques for Digital Receivers,
       Plenum Press, 1997.
    """
    if not symbol_rate > 0:
        raise ValueError(f"symbol_rate must be > 0 (got {symbol_rate!r})")
    if not max_offset_hz > 0:
        raise ValueError(f"max_offset_hz must be > 0 (got {max_offset_hz!r})")
    if not deviation_hz >= 0:
        raise ValueError(f"deviation_hz must be >= 0 (got {deviation_hz!r})")
    if occupied_hz is not None:
        half = float(occupied_hz)
    else:
        half = deviation_hz + symbol_rate / 2.0 if deviation_hz > 0 else float(symbol_rate)
    need = half + max_offset_hz
    if not need < sample_rate / 2.0:
        raise ValueError(f"signal half-width plus max_offset_hz ({need:g} Hz) must be below "
                         f"half the sample rate {sample_rate / 2:g} Hz")
    lag = math.floor(sample_rate * (1.0 - PREFILTER_ROLLOFF) / (2.0 * need))
    if deviation_hz > 0:
        lag = min(lag, math.floor(_MAX_TONE_TURN * sample_rate / (2 * math.pi * deviation_hz)))
    lag = max(lag, 1)
    if lag == 1:
        taps = np.ones(1, dtype=np.float32)
    else:
        taps = rrc_taps(lag, PREFILTER_ROLLOFF, PREFILTER_SPAN).astype(np.float32)
    taps.setflags(write=False)
    return LagDesign(lag, taps, float(sample_rate))


@dataclass(frozen=True)
class CorrelatorState:
    """State of :func:`windowed_lag_correlation` between chunks.

    Attributes
    ----------
    prefilter : FirState or None
        Prefilter history (None without a prefilter).
    tail : numpy.ndarray
        The last ``L`` prefiltered samples.
    window : WindowState
        The window being filled.
    """

    prefilter: FirState | None
    tail: np.ndarray
    window: WindowState


def windowed_lag_correlation(x: np.ndarray, design: LagDesign, window: int,
                             state: CorrelatorState | None = None,
                             ) -> tuple[np.ndarray, CorrelatorState]:
    """Lag-``L`` autocorrelation sums over consecutive windows of ``window`` samples.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 input chunk.
    design : LagDesign
        From :func:`design_lag_estimator`.
    window : int
        Window length in samples (>= 1). Window ``w`` holds the absolute samples
        ``w * window .. (w + 1) * window - 1`` (see ``blocks/_windows.py``).
    state : CorrelatorState, optional
        State from the previous call; None at the start of a stream.

    Returns
    -------
    sums : numpy.ndarray
        complex128 ``sum y[n] y*[n - L]`` (``y`` the prefiltered input, zero before the
        stream starts) for every window completed in this chunk, in order.
    state : CorrelatorState
        State for the next chunk; ``state.window.partial`` is the sum of the incomplete
        window.

    Notes
    -----
    The products are never formed: each window (or piece of one) is one conjugated dot
    product (BLAS ``zdotc``) of the prefiltered samples with themselves ``L`` later, taken in
    complex128 so that the sum over a long window accumulates in float64.
    """
    lag = design.lag
    if state is None:
        state = CorrelatorState(None, np.zeros(lag, dtype=np.complex64), WindowState())
    if design.taps.shape[0] == 1 and design.taps[0] == 1:
        y, fir_state = np.asarray(x, dtype=np.complex64), None      # no prefilter (L == 1)
    else:
        y, fir_state = fir_filter(x, design.taps, state.prefilter)
    n = y.shape[0]
    ext = work_array("cfo.ext", lag + n, np.complex128)
    ext[:lag] = state.tail
    ext[lag:] = y
    earlier, later = ext[:n], ext[lag:]               # y[n - L] and y[n]

    def segment(a: int, b: int) -> complex:
        return complex(np.vdot(earlier[a:b], later[a:b]))

    def whole(a: int, k: int) -> np.ndarray:
        return np.array([segment(a + i * window, a + (i + 1) * window) for i in range(k)])

    sums, win = sum_windows(n, window, segment, whole, state.window)
    tail = ext[n:].astype(np.complex64)
    return sums, CorrelatorState(fir_state, tail, win)


def offset_from_correlation(correlation: complex | np.ndarray, lag: int,
                            sample_rate: float) -> np.ndarray | float:
    """Frequency offset in Hz from a lag-``L`` autocorrelation.

    Parameters
    ----------
    correlation : complex or numpy.ndarray
        ``sum x[n] x*[n - L]``.
    lag : int
        The lag ``L`` in samples.
    sample_rate : float
        Sample rate in Hz.

    Returns
    -------
    float or numpy.ndarray
        ``angle(correlation) * sample_rate / (2 pi L)``, in ``(-fs / (2 L), fs / (2 L)]``.

    Notes
    -----
    [1]_ (chapter 3, the delay-and-multiply / correlation-based frequency estimators).

    References
    ----------
    .. [1] U. Mengali and A. N. D'Andrea, Synchronization Techniques for Digital Receivers,
       Plenum Press, 1997.
    """
    return np.angle(correlation) * sample_rate / (2.0 * math.pi * lag)
