"""Simulated radio channel on complex baseband: flat Rayleigh fading, carrier frequency offset,
a random start phase, Wiener phase noise and additive white Gaussian noise.

Every random quantity is a pure function of the seed and of the absolute sample index, so the
output does not depend on how the stream is cut into chunks. The noise and the phase-noise
increments are drawn in fixed blocks of ``NOISE_BLOCK`` samples, block ``b`` from its own
generator ``SeedSequence(seed, spawn_key=(stream, b))``; the start phase and the fading
process's random parameters come from ``SeedSequence(seed, spawn_key=(0,))``. Each impairment
has its own stream, so switching one on leaves the others' realisations unchanged.

The model, applied in this order, is ``y[n] = h(n / fs) x[n] exp(j phi[n]) + w[n]`` with
``phi[n] = phi0 + 2 pi cfo n / fs + theta[n]``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "FADING_SINUSOIDS",
    "NOISE_BLOCK",
    "Channel",
    "ChannelState",
    "apply_channel",
    "awgn_variance",
    "design_channel",
    "fading_gain",
]

#: Samples per independently seeded block of noise and phase-noise increments.
NOISE_BLOCK = 8192
#: Number of sinusoids in the fading process.
FADING_SINUSOIDS = 16
# Fading is evaluated on a grid of at least this many points per Doppler period and
# interpolated linearly between them (relative error below 1e-4).
_FADING_POINTS_PER_PERIOD = 256

_SETUP_KEY, _NOISE_KEY, _PHASE_KEY = 0, 1, 2


def awgn_variance(ebn0_db: float, signal_power: float, bit_rate: float,
                  sample_rate: float) -> float:
    """Complex noise variance per sample for a given Eb/N0 over the full sample bandwidth.

    Parameters
    ----------
    ebn0_db : float
        Energy per bit over noise spectral density, dB; ``+inf`` means no noise.
    signal_power : float
        Average signal power while transmitting (mean ``|x|**2``).
    bit_rate : float
        Information bits per second.
    sample_rate : float
        Samples per second.

    Returns
    -------
    float
        ``N0 * sample_rate`` with ``N0 = Eb / 10**(ebn0_db / 10)`` and
        ``Eb = signal_power / bit_rate``: the variance ``E|w|**2`` of complex white noise whose
        two-sided spectral density is ``N0`` across the band ``-fs/2 .. fs/2``.

    Notes
    -----
    ``Eb = P Tb`` is the definition of energy per bit [1]_; a complex baseband sample stream
    at rate ``fs`` sees white noise of density ``N0`` as independent samples of variance
    ``N0 fs`` (common practice).

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    """
    if math.isnan(ebn0_db):
        raise ValueError(f"ebn0_db must be a number (got {ebn0_db!r})")
    for name, value in (("signal_power", signal_power), ("bit_rate", bit_rate),
                        ("sample_rate", sample_rate)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"{name} must be a finite number > 0 (got {value!r})")
    if ebn0_db == math.inf:
        return 0.0
    n0 = signal_power / bit_rate / 10.0 ** (ebn0_db / 10.0)
    return n0 * sample_rate


@dataclass(frozen=True)
class Channel:
    """A designed channel (see :func:`design_channel`); apply it with :func:`apply_channel`."""

    sample_rate: float
    noise_variance: float
    cfo_hz: float
    linewidth_hz: float
    fading_doppler_hz: float
    seed: int
    start_phase: float
    #: Fading: per-sinusoid Doppler shift (Hz), phase and complex weight.
    fading_freqs: np.ndarray = field(repr=False)
    fading_phases: np.ndarray = field(repr=False)
    fading_weights: np.ndarray = field(repr=False)
    fading_step: int = 1

    @property
    def phase_noise_variance(self) -> float:
        """Variance of one phase-noise increment: ``2 pi linewidth / fs`` (rad^2)."""
        return 2.0 * math.pi * self.linewidth_hz / self.sample_rate

    @property
    def is_identity(self) -> bool:
        """Whether the channel leaves the signal untouched."""
        return (self.noise_variance == 0 and self.cfo_hz == 0 and self.linewidth_hz == 0
                and self.fading_doppler_hz == 0 and self.start_phase == 0)


@dataclass(frozen=True)
class ChannelState:
    """Where a channel stands between calls.

    Parameters
    ----------
    next_index : int
        Absolute index of the next input sample.
    phase_noise : float
        Wiener phase (rad) after the last sample.
    block : int
        Index of the cached noise block (-1: none).
    noise, increments : numpy.ndarray
        That block's noise samples and phase-noise increments.
    """

    next_index: int = 0
    phase_noise: float = 0.0
    block: int = -1
    noise: np.ndarray = field(default_factory=lambda: np.zeros(0, np.complex64), repr=False)
    increments: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)


def design_channel(sample_rate: float, noise_variance: float = 0.0, cfo_hz: float = 0.0,
                   linewidth_hz: float = 0.0, fading_doppler_hz: float = 0.0, seed: int = 0,
                   random_phase: bool = True) -> Channel:
    """Check the settings and draw the channel's fixed random parameters.

    Parameters
    ----------
    sample_rate : float
        Samples per second.
    noise_variance : float
        ``E|w|**2`` of the complex white Gaussian noise per sample (see :func:`awgn_variance`).
    cfo_hz : float
        Carrier frequency offset, below half the sample rate in magnitude.
    linewidth_hz : float
        Oscillator linewidth (Lorentzian full width at half maximum) of the Wiener phase noise.
    fading_doppler_hz : float
        Maximum Doppler shift of flat Rayleigh fading; 0 disables fading.
    seed : int
        Seed (>= 0) of every random draw.
    random_phase : bool
        Start the carrier at a uniformly random phase (else at 0).

    Returns
    -------
    Channel

    Notes
    -----
    Fading is the sum of sinusoids of [1]_:
    ``h(t) = sqrt(2 / M) sum_n exp(j psi_n) cos(2 pi f_d cos(alpha_n) t + phi_n)`` with
    ``alpha_n = (2 pi n - pi + theta) / (4 M)``, ``n = 1..M``, and ``theta``, ``phi_n``,
    ``psi_n`` independent and uniform on ``[-pi, pi)`` (independent ``phi_n`` per sinusoid,
    the variant with the better statistics; from memory). Its mean power is 1 and its
    autocorrelation tends to Clarke's ``J0(2 pi f_d tau)`` [2]_.

    References
    ----------
    .. [1] Y. R. Zheng and C. Xiao, "Simulation models with correct statistical properties for
       Rayleigh fading channels", IEEE Trans. Commun. 51(6), 920-928, 2003.
    .. [2] R. H. Clarke, "A statistical theory of mobile-radio reception", Bell Syst. Tech. J.
       47(6), 957-1000, 1968.
    """
    if not (math.isfinite(sample_rate) and sample_rate > 0):
        raise ValueError(f"sample_rate must be a finite number > 0 (got {sample_rate!r})")
    if not (math.isfinite(noise_variance) and noise_variance >= 0):
        raise ValueError(f"noise_variance must be a finite number >= 0 (got {noise_variance!r})")
    if not (math.isfinite(cfo_hz) and abs(cfo_hz) < sample_rate / 2):
        raise ValueError(f"cfo_hz must be below half the sample rate {sample_rate / 2:g} Hz "
                         f"in magnitude (got {cfo_hz!r})")
    if not (math.isfinite(linewidth_hz) and 0 <= linewidth_hz <= sample_rate):
        raise ValueError(f"linewidth_hz must be in 0 .. sample rate {sample_rate:g} Hz "
                         f"(got {linewidth_hz!r})")
    if not (math.isfinite(fading_doppler_hz) and 0 <= fading_doppler_hz < sample_rate / 2):
        raise ValueError(f"fading_doppler_hz must be >= 0 and below half the sample rate "
                         f"{sample_rate / 2:g} Hz (got {fading_doppler_hz!r})")
    if int(seed) != seed or seed < 0:
        raise ValueError(f"seed must be an integer >= 0 (got {seed!r})")
    rng = np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(_SETUP_KEY,)))
    start_phase = float(rng.uniform(0.0, 2.0 * np.pi))
    m = FADING_SINUSOIDS
    theta = rng.uniform(-np.pi, np.pi)
    phases = rng.uniform(-np.pi, np.pi, m)
    psi = rng.uniform(-np.pi, np.pi, m)
    alpha = (2.0 * np.pi * np.arange(1, m + 1) - np.pi + theta) / (4.0 * m)
    freqs = fading_doppler_hz * np.cos(alpha)
    weights = math.sqrt(2.0 / m) * np.exp(1j * psi)
    step = 1
    if fading_doppler_hz > 0:
        step = max(1, int(sample_rate / (fading_doppler_hz * _FADING_POINTS_PER_PERIOD)))
    for arr in (freqs, phases, weights):
        arr.setflags(write=False)
    return Channel(float(sample_rate), float(noise_variance), float(cfo_hz), float(linewidth_hz),
                   float(fading_doppler_hz), int(seed), start_phase if random_phase else 0.0,
                   freqs, phases, weights, step)


def fading_gain(ch: Channel, t: np.ndarray) -> np.ndarray:
    """The fading process at times ``t`` (seconds), evaluated exactly (no grid).

    Parameters
    ----------
    ch : Channel
        A channel with ``fading_doppler_hz > 0``.
    t : numpy.ndarray
        Times in seconds.

    Returns
    -------
    numpy.ndarray
        complex128 gains ``h(t)`` (see :func:`design_channel`).
    """
    t = np.asarray(t, dtype=np.float64)
    arg = 2.0 * np.pi * t[..., None] * ch.fading_freqs + ch.fading_phases
    return np.cos(arg) @ ch.fading_weights


def _fading_samples(ch: Channel, n: np.ndarray) -> np.ndarray:
    """Fading at sample indices ``n`` (consecutive), interpolated linearly from its grid."""
    step = ch.fading_step
    g = n // step
    g0 = int(g[0])
    grid = np.arange(g0, int(g[-1]) + 2, dtype=np.int64)
    h = fading_gain(ch, grid * step / ch.sample_rate)
    frac = (n - g * step) / step
    i = g - g0
    return h[i] * (1.0 - frac) + h[i + 1] * frac


def _draw_block(ch: Channel, b: int) -> tuple[np.ndarray, np.ndarray]:
    """Noise and phase-noise increments of block ``b``."""
    noise = np.zeros(NOISE_BLOCK, np.complex64)
    if ch.noise_variance > 0:
        rng = np.random.default_rng(np.random.SeedSequence(ch.seed, spawn_key=(_NOISE_KEY, b)))
        pair = rng.standard_normal((NOISE_BLOCK, 2), dtype=np.float32)
        noise = pair.view(np.complex64)[:, 0] * np.float32(math.sqrt(ch.noise_variance / 2))
    incr = np.zeros(NOISE_BLOCK)
    if ch.linewidth_hz > 0:
        rng = np.random.default_rng(np.random.SeedSequence(ch.seed, spawn_key=(_PHASE_KEY, b)))
        incr = rng.standard_normal(NOISE_BLOCK) * math.sqrt(ch.phase_noise_variance)
    return noise, incr


def _random_parts(ch: Channel, start: int, count: int, state: ChannelState,
                  ) -> tuple[np.ndarray, np.ndarray, ChannelState]:
    """Noise and phase-noise increments for samples ``start .. start + count - 1``."""
    b0, b1 = start // NOISE_BLOCK, (start + count - 1) // NOISE_BLOCK
    noises, incrs = [], []
    block, noise, incr = state.block, state.noise, state.increments
    for b in range(b0, b1 + 1):
        if b != block:
            block = b
            noise, incr = _draw_block(ch, b)
        noises.append(noise)
        incrs.append(incr)
    lo = start - b0 * NOISE_BLOCK
    w = np.concatenate(noises)[lo:lo + count]
    d = np.concatenate(incrs)[lo:lo + count]
    return w, d, ChannelState(state.next_index, state.phase_noise, block, noise, incr)


def apply_channel(x: np.ndarray, ch: Channel, state: ChannelState | None = None,
                  ) -> tuple[np.ndarray, ChannelState]:
    """Pass complex baseband samples through the channel.

    Parameters
    ----------
    x : numpy.ndarray
        complex samples; treated as the stream's samples ``state.next_index ..``.
    ch : Channel
        From :func:`design_channel`.
    state : ChannelState or None
        The state returned by the previous call; None at the start of the stream.

    Returns
    -------
    y : numpy.ndarray
        complex64 channel output.
    state : ChannelState
        Continue with it.

    Notes
    -----
    The phase noise is a Wiener process, ``theta[n] = theta[n-1] + e[n]`` with
    ``e[n] ~ N(0, 2 pi linewidth / fs)``: the discrete form of the Brownian phase of an
    oscillator with a Lorentzian spectrum of full width ``linewidth`` at half maximum [1]_.
    The carrier offset's phase ``2 pi cfo n / fs`` is computed from the absolute index ``n``
    (no accumulated rounding).

    References
    ----------
    .. [1] A. Demir, A. Mehrotra and J. Roychowdhury, "Phase noise in oscillators: a unifying
       theory and numerical methods for characterization", IEEE Trans. Circuits Syst. I 47(5),
       655-674, 2000 (the relation of increment variance to linewidth is from memory).
    """
    if state is None:
        state = ChannelState()
    x = np.asarray(x)
    count = x.shape[0]
    start = state.next_index
    if count == 0:
        return np.zeros(0, np.complex64), state
    if ch.is_identity:
        return x.astype(np.complex64), ChannelState(start + count, state.phase_noise)
    n = np.arange(start, start + count, dtype=np.int64)
    w, incr, state = _random_parts(ch, start, count, state)
    phase = ch.start_phase + 2.0 * np.pi * np.mod(n * (ch.cfo_hz / ch.sample_rate), 1.0)
    theta_end = state.phase_noise
    if ch.linewidth_hz > 0:
        theta = state.phase_noise + np.cumsum(incr)
        phase = phase + theta
        theta_end = float(np.mod(theta[-1], 2.0 * np.pi))
    # Reduced to one turn in double precision, the rotation itself is single precision.
    y = x * np.exp(1j * np.mod(phase, 2.0 * np.pi).astype(np.float32))
    if ch.fading_doppler_hz > 0:
        y = y * _fading_samples(ch, n).astype(np.complex64)
    y = y.astype(np.complex64) + w
    return y, ChannelState(start + count, theta_end, state.block, state.noise,
                           state.increments)
