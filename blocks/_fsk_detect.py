"""Noncoherent detection of binary FSK with a bank of two tone correlators.

Each symbol arrives as ``S`` complex samples spanning its interval. Correlating them against
the two tones at ``-deviation`` and ``+deviation`` and comparing the squared magnitudes is the
optimum noncoherent (square-law) receiver for equiprobable orthogonal binary FSK in white
Gaussian noise [1]_; the carrier phase does not enter the decision. The upper tone is bit 1,
as in the transmitter (``blocks/_modulate.py``).

References
----------
.. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008,
   sec. 4.5 (optimal noncoherent detection, square-law combining) and sec. 4.5-3 (binary
   orthogonal FSK, ``Pb = exp(-Eb/2N0)/2``).
"""

from __future__ import annotations

import numpy as np

__all__ = ["fsk_detect", "tone_matrix"]


def tone_matrix(samples_per_symbol: int, deviation_hz: float, sample_rate: float) -> np.ndarray:
    """Conjugate reference tones for the correlator bank.

    Parameters
    ----------
    samples_per_symbol : int
        ``S``, samples per symbol interval (>= 1).
    deviation_hz : float
        Tone offset from the centre frequency (> 0); tones at ``-deviation_hz`` (bit 0) and
        ``+deviation_hz`` (bit 1).
    sample_rate : float
        Sample rate of the input in Hz (> 2 * deviation_hz).

    Returns
    -------
    numpy.ndarray
        Read-only complex64 array of shape ``(S, 2)``: column 0 is ``exp(+j 2 pi f n / fs)``
        for the lower tone ``f = -deviation_hz`` conjugated, column 1 the same for the upper
        tone, ``n = 0 .. S-1`` counted from the start of the symbol.

    Notes
    -----
    The tones are orthogonal over one symbol when the spacing ``2 * deviation_hz`` is a
    multiple of the symbol rate [1]_; other spacings still work with a loss.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 3.2.
    """
    if samples_per_symbol < 1:
        raise ValueError(f"samples_per_symbol must be >= 1 (got {samples_per_symbol})")
    if not deviation_hz > 0:
        raise ValueError(f"deviation_hz must be > 0 (got {deviation_hz})")
    if not sample_rate > 2 * deviation_hz:
        raise ValueError(f"sample_rate must exceed 2 * deviation_hz = {2 * deviation_hz:g} Hz "
                         f"(got {sample_rate:g})")
    n = np.arange(samples_per_symbol, dtype=np.float64)[:, None]
    freqs = np.array([-deviation_hz, deviation_hz], dtype=np.float64)[None, :]
    tones = np.exp(-2j * np.pi * freqs * n / sample_rate).astype(np.complex64)
    tones.setflags(write=False)
    return tones


def fsk_detect(x: np.ndarray, tones: np.ndarray, state: np.ndarray | None = None,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Decide 2-FSK symbols by the larger tone energy.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 samples, ``S`` per symbol; sample ``S*k`` of the stream starts symbol ``k``.
    tones : numpy.ndarray
        Output of ``tone_matrix``, shape ``(S, 2)``.
    state : numpy.ndarray or None
        Samples of an incomplete symbol left by the previous call (None at stream start).

    Returns
    -------
    bits : numpy.ndarray
        uint8, 1 where the upper tone holds more energy.
    soft : numpy.ndarray
        float32 ``(E1 - E0) / (E1 + E0)`` in [-1, 1], the energy difference normalised by the
        total so it does not depend on the input scale (0 for an all-zero symbol).
    state : numpy.ndarray
        Samples of the incomplete last symbol, for the next call.

    Notes
    -----
    ``E_i = |sum_n x[n] conj(t_i[n])|^2`` for the tone ``t_i`` (square-law combining [1]_),
    computed for a whole chunk as one ``(symbols, S) @ (S, 2)`` matrix product.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 4.5.
    """
    s = tones.shape[0]
    x = np.asarray(x, dtype=np.complex64)
    if state is not None and state.size:
        x = np.concatenate([state, x])
    count = x.shape[0] // s
    c = x[: count * s].reshape(count, s) @ tones
    energy = c.real.astype(np.float64) ** 2 + c.imag.astype(np.float64) ** 2
    diff = energy[:, 1] - energy[:, 0]
    total = energy[:, 1] + energy[:, 0]
    soft = np.divide(diff, total, out=np.zeros_like(diff), where=total > 0)
    return (diff > 0).astype(np.uint8), soft.astype(np.float32), x[count * s:].copy()
