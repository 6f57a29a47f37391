"""Link budget: receiver sensitivity from Eb/N0, and free-space range.

Sensitivity is the carrier power at the receiver input that gives the required Eb/N0 at the
given bit rate (common practice, all in dB):

``S = 10 log10(k T0 * 1 mW^-1) + NF + 10 log10(R) + Eb/N0_required + L``

with ``k`` Boltzmann's constant, ``T0 = 290 K`` the noise-figure reference temperature [1]_
(``k T0`` is -173.98 dBm/Hz), ``NF`` the receiver noise figure, ``R`` the bit rate and ``L``
the implementation loss of a real receiver against theory.

The free-space basic transmission loss between isotropic antennas is
``L_bf = 20 log10(4 pi d / lambda)`` [2]_ [3]_, which with ``f`` in MHz and ``d`` in km is
``32.45 + 20 log10 f + 20 log10 d``. The range is where the path loss uses up what the link
can afford: ``P_tx + G_tx + G_rx - S - margin``. Free space is an upper bound: ground
reflection, obstruction and fading only shorten it.

References
----------
.. [1] H. T. Friis, "Noise figures of radio receivers", Proc. IRE 32(7), 1944 (noise figure
   referred to the standard temperature of 290 K).
.. [2] H. T. Friis, "A note on a simple transmission formula", Proc. IRE 34(5), 1946.
.. [3] Recommendation ITU-R P.525, "Calculation of free-space attenuation" (basic
   transmission loss ``20 log10(4 pi d / lambda)``).
"""

from __future__ import annotations

import math

from scipy.constants import Boltzmann, speed_of_light

__all__ = [
    "REFERENCE_TEMPERATURE_K",
    "free_space_loss_db",
    "free_space_range_m",
    "noise_density_dbm_hz",
    "sensitivity_dbm",
]

#: Standard noise temperature for noise figures, kelvin.
REFERENCE_TEMPERATURE_K = 290.0


def _positive(name: str, value: float) -> float:
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a finite number > 0 (got {value!r})")
    return value


def _finite(name: str, value: float) -> float:
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number (got {value!r})")
    return value


def noise_density_dbm_hz(temperature_k: float = REFERENCE_TEMPERATURE_K) -> float:
    """Thermal noise power spectral density ``k T`` in dBm/Hz.

    Parameters
    ----------
    temperature_k : float
        Noise temperature in kelvin (default 290 K, the noise-figure reference [1]_).

    Returns
    -------
    float
        ``10 log10(k T / 1 mW)``; -173.98 dBm/Hz at 290 K.

    References
    ----------
    .. [1] H. T. Friis, Proc. IRE 32(7), 1944.
    """
    t = _positive("temperature_k", temperature_k)
    return 10.0 * math.log10(Boltzmann * t / 1e-3)


def sensitivity_dbm(ebn0_db: float, bit_rate: float, noise_figure_db: float,
                    loss_db: float = 0.0) -> float:
    """Receiver input power (dBm) needed for ``ebn0_db`` at ``bit_rate``.

    Parameters
    ----------
    ebn0_db : float
        Required Eb/N0 (dB), e.g. from ``blocks._theory.ebn0_for_ber``.
    bit_rate : float
        Bit rate in bit/s, > 0.
    noise_figure_db : float
        Receiver noise figure (dB), >= 0.
    loss_db : float
        Implementation loss against theory (dB), >= 0.

    Returns
    -------
    float
        ``kT0 + NF + 10 log10(R) + Eb/N0 + L`` in dBm (module notes).
    """
    ebn0 = _finite("ebn0_db", ebn0_db)
    rate = _positive("bit_rate", bit_rate)
    nf = _finite("noise_figure_db", noise_figure_db)
    if nf < 0:
        raise ValueError(f"noise_figure_db must be >= 0 (got {nf!r})")
    loss = _finite("loss_db", loss_db)
    if loss < 0:
        raise ValueError(f"loss_db must be >= 0 (got {loss!r})")
    return noise_density_dbm_hz() + nf + 10.0 * math.log10(rate) + ebn0 + loss


def free_space_loss_db(frequency_hz: float, distance_m: float) -> float:
    """Free-space basic transmission loss ``20 log10(4 pi d f / c)`` in dB.

    Parameters
    ----------
    frequency_hz : float
        Carrier frequency, > 0.
    distance_m : float
        Path length, > 0.

    Returns
    -------
    float
        Loss between isotropic antennas (ITU-R P.525 [1]_).

    References
    ----------
    .. [1] Recommendation ITU-R P.525, "Calculation of free-space attenuation".
    """
    f = _positive("frequency_hz", frequency_hz)
    d = _positive("distance_m", distance_m)
    return 20.0 * math.log10(4.0 * math.pi * d * f / speed_of_light)


def free_space_range_m(path_loss_db: float, frequency_hz: float) -> float:
    """Distance at which the free-space loss reaches ``path_loss_db``.

    Parameters
    ----------
    path_loss_db : float
        The path loss the link can afford (dB).
    frequency_hz : float
        Carrier frequency, > 0.

    Returns
    -------
    float
        ``lambda / (4 pi) * 10^(L/20)`` in metres: the inverse of ``free_space_loss_db``.
    """
    loss = _finite("path_loss_db", path_loss_db)
    f = _positive("frequency_hz", frequency_hz)
    return speed_of_light / (4.0 * math.pi * f) * 10.0 ** (loss / 20.0)
