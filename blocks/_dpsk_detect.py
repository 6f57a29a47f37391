"""Differential detection of DBPSK and pi/4-DQPSK.

The receiver compares each symbol sample with the one before: ``d[k] = y[k] conj(y[k-1])``
carries the phase step between them, and the unknown carrier phase cancels [1]_. DBPSK decides
by the sign of ``Re d``; pi/4-DQPSK by the quadrant of ``d``, its phase steps being the odd
multiples of pi/4. The bit-to-step tables below are the transmitter's (``blocks/_modulate.py``).

References
----------
.. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008,
   sec. 4.6 (differential PSK and its detection; section number from memory).
"""

from __future__ import annotations

import numpy as np

from blocks._modulate import DQPSK_PHASE_STEPS

__all__ = ["DBPSK_STEPS", "DQPSK_STEPS", "differential_products", "dpsk_detect"]

#: DBPSK phase step for bit 0 and bit 1 (radians): a 1 flips the phase.
DBPSK_STEPS = (0.0, np.pi)

#: pi/4-DQPSK phase step (radians) for the dibits 00, 01, 10, 11 (first bit is the MSB):
#: the transmitter's table, so the two cannot drift apart.
DQPSK_STEPS = tuple(float(np.pi / 4 * s) for s in DQPSK_PHASE_STEPS)


def differential_products(y: np.ndarray, last: np.ndarray | None = None,
                          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Differential products of consecutive symbol samples.

    Parameters
    ----------
    y : numpy.ndarray
        complex samples, one per symbol.
    last : numpy.ndarray or None
        The previous call's last sample as a length-1 array (None or empty at stream start:
        the first sample is then only a phase reference and yields no product).

    Returns
    -------
    d : numpy.ndarray
        complex64 ``y[k] conj(y[k-1])``.
    power : numpy.ndarray
        float64 ``|y[k]|^2 + |y[k-1]|^2``, the normaliser of the soft values.
    last : numpy.ndarray
        The last sample seen (length 1, or 0 if none yet), for the next call.
    """
    y = np.ascontiguousarray(y, dtype=np.complex64)
    if last is not None and last.size:
        y = np.concatenate([last.astype(np.complex64), y])
    d = y[1:] * y[:-1].conj()
    parts = y.view(np.float32).astype(np.float64)
    parts *= parts
    mag = parts[0::2] + parts[1::2]
    return d, mag[1:] + mag[:-1], y[-1:].copy()


def _bit_groups(steps: tuple[float, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Conjugate constellation of the steps and, per bit, the codes that carry a 1 or a 0.

    The code groups are index arrays of shape (bits, codes per group): each bit's max-log term
    is the larger projection of each group.
    """
    points = np.exp(-1j * np.asarray(steps)).astype(np.complex64)
    codes = np.arange(len(steps))
    ones = np.array([(codes >> (1 - b)) & 1 == 1 for b in range(2)])
    return points, np.array([np.flatnonzero(r) for r in ones]), \
        np.array([np.flatnonzero(~r) for r in ones])


_DQPSK_POINTS, _DQPSK_ONES, _DQPSK_ZEROS = _bit_groups(DQPSK_STEPS)
_DQPSK_PROJECTION = np.vstack((_DQPSK_POINTS.real, -_DQPSK_POINTS.imag)).astype(np.float32)


def dpsk_detect(y: np.ndarray, modulation: str, state: np.ndarray | None = None,
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Differentially detect DBPSK or pi/4-DQPSK symbols.

    Parameters
    ----------
    y : numpy.ndarray
        complex samples, one per symbol, at the matched filter's optimum instants.
    modulation : {"dbpsk", "dqpsk"}
        The scheme; ``"dqpsk"`` means pi/4-DQPSK with the table ``DQPSK_STEPS``.
    state : numpy.ndarray or None
        Last sample of the previous call (None at stream start).

    Returns
    -------
    bits : numpy.ndarray
        uint8 bits, one per symbol (DBPSK) or two, MSB first (DQPSK), for every symbol after
        the first of the stream.
    soft : numpy.ndarray
        float32 per bit, positive = 1, divided by ``|y[k]|^2 + |y[k-1]|^2`` so it does not
        depend on the input scale. DBPSK: ``-2 Re d``, i.e. the energy difference
        ``|y[k] - y[k-1]|^2 - |y[k] + y[k-1]|^2`` over their sum, the same normalised form as
        the FSK detector's, within [-1, 1]. DQPSK: the max-log difference
        ``sqrt(2) (max_{c: bit=1} Re(d e^{-j phi_c}) - max_{c: bit=0} Re(d e^{-j phi_c}))``;
        for a Gray table this is ``+/- 2 Re d`` or ``+/- 2 Im d``, again within [-1, 1].
    state : numpy.ndarray
        Last sample, for the next call.

    Notes
    -----
    DBPSK: bit 1 where ``Re d < 0`` (a phase step of pi). pi/4-DQPSK: the dibit whose phase
    step is nearest to ``arg d`` (for a Gray table, each bit by the sign of one component of
    ``d``: the quadrant decision [1]_); the max-log soft values give the same hard bits.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 4.6.
    """
    d, power, last = differential_products(y, state)
    safe = np.where(power > 0, power, 1.0)
    if modulation == "dbpsk":
        soft = -2.0 * d.real / safe
    elif modulation == "dqpsk":
        # Re(d exp(-j phi_c)) for the four codes at once: (Re d, Im d) @ (cos phi_c, sin phi_c)
        proj = d.view(np.float32).reshape(-1, 2) @ _DQPSK_PROJECTION
        scale = np.sqrt(2.0) / safe
        soft = np.empty((d.shape[0], 2))
        for b in range(2):
            ones = np.maximum(proj[:, _DQPSK_ONES[b, 0]], proj[:, _DQPSK_ONES[b, 1]])
            ones -= np.maximum(proj[:, _DQPSK_ZEROS[b, 0]], proj[:, _DQPSK_ZEROS[b, 1]])
            np.multiply(ones, scale, out=soft[:, b])
        soft = soft.reshape(-1)
    else:
        raise ValueError(f"modulation must be 'dbpsk' or 'dqpsk' (got {modulation!r})")
    return (soft > 0).astype(np.uint8), soft.astype(np.float32), last
