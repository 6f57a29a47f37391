"""Baseband modulators for the simulated transmitter: OOK, 2-FSK (CPFSK / GFSK), DBPSK and
pi/4-DQPSK, at any (also non-integer) number of samples per symbol.

Timing is exact. The symbol clock is held as a ratio of integers, ``Q / P`` symbols per sample,
so sample ``n`` lies at symbol time ``n Q / P`` computed in integer arithmetic: symbol ``k``
owns the samples ``ceil(k P / Q) .. ceil((k + 1) P / Q) - 1`` however long the run, and the
output is a pure function of the symbol sequence, so it does not depend on how the symbols are
fed in pieces (chunk-size invariance is exact, not merely to rounding).

Every pulse is causal and ``memory`` symbols long: symbol ``k`` shapes the signal over symbol
times ``k .. k + memory``. Rectangular pulses have ``memory = 1``; root-raised-cosine and
Gaussian pulses of ``span_symbols`` have ``memory = span_symbols`` and are centred on
``k + memory / 2``, i.e. delayed by ``(memory - 1) / 2`` symbols relative to a rectangular
pulse (see ``Modulator.delay_symbols``).

Average power is 1 while transmitting: OOK sends amplitude ``sqrt(2)`` for a 1 and 0 for a 0
(unit power averaged over equiprobable bits), the phase-shift keyings have unit-modulus
symbols and unit-energy pulses, 2-FSK has a unit envelope. ``SILENT`` symbols send nothing
(zero amplitude; the FSK phase and the differential phase reference are held).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np

from blocks._pulses import (
    _check_bt,
    _check_rolloff,
    _check_span,
    gaussian_phase_pulse,
    rrc_pulse,
    rrc_pulse_grid,
)

__all__ = [
    "BITS_PER_SYMBOL",
    "DQPSK_PHASE_STEPS",
    "MODULATIONS",
    "PULSES",
    "SILENT",
    "Modulator",
    "ModulatorState",
    "SymbolClock",
    "bits_to_symbols",
    "design_modulator",
    "modulate",
]

#: Modulation names.
MODULATIONS = ("ook", "2fsk", "dbpsk", "dqpsk")
#: Pulse shape names: ``rect`` (all), ``rrc`` (ook, dbpsk, dqpsk), ``gaussian`` (2fsk: GFSK).
PULSES = ("rect", "rrc", "gaussian")
#: Bits carried by one symbol.
BITS_PER_SYMBOL = {"ook": 1, "2fsk": 1, "dbpsk": 1, "dqpsk": 2}
#: Symbol code meaning "transmit nothing for one symbol period".
SILENT = -1

#: pi/4-DQPSK phase step in units of pi/4 for the dibit codes 0..3 (00, 01, 10, 11; first bit
#: is the MSB): 00 -> +pi/4, 01 -> +3pi/4, 10 -> -pi/4, 11 -> -3pi/4. Gray coded: steps that
#: are neighbours on the circle differ in one bit. This is the table of the pi/4-DQPSK mobile
#: radio standards (ETSI EN 300 392-2 clause 5.5.2 and TIA/EIA-136; cited from memory).
DQPSK_PHASE_STEPS = (1, 3, -1, -3)

# Largest denominator of the symbol-clock ratio: keeps every integer product below 2**62.
_MAX_CLOCK_DENOMINATOR = (1 << 31) - 1
# Tabulate pulse weights for every sample phase when there are at most this many table cells.
_MAX_TABLE_CELLS = 1 << 19
# Midpoint-rule points per symbol for the truncated-RRC energy integral.
_ENERGY_POINTS_PER_SYMBOL = 4096


@dataclass(frozen=True)
class SymbolClock:
    """The ratio ``symbols / samples`` (symbols per sample) as exact integers.

    Parameters
    ----------
    symbols, samples : int
        Numerator ``Q`` and denominator ``P``, coprime, ``1 <= Q <= P``.
    """

    symbols: int
    samples: int

    @classmethod
    def from_rates(cls, symbol_rate: float, sample_rate: float) -> SymbolClock:
        """The clock for ``symbol_rate`` symbols/s sampled at ``sample_rate`` samples/s.

        The ratio is exact when it has a denominator below 2**31 (any pair of integer rates
        in practice); otherwise it is the nearest such fraction (relative error < 1e-18 for
        rates in the kHz..GHz range), which then defines the transmitter's clock.
        """
        if not (math.isfinite(symbol_rate) and symbol_rate > 0):
            raise ValueError(f"symbol_rate must be a finite number > 0 (got {symbol_rate!r})")
        if not (math.isfinite(sample_rate) and sample_rate > 0):
            raise ValueError(f"sample_rate must be a finite number > 0 (got {sample_rate!r})")
        ratio = (Fraction(symbol_rate) / Fraction(sample_rate)).limit_denominator(
            _MAX_CLOCK_DENOMINATOR)
        if ratio <= 0 or ratio > 1:
            raise ValueError(f"sample_rate must be at least symbol_rate (got {sample_rate!r} "
                             f"for {symbol_rate!r})")
        return cls(ratio.numerator, ratio.denominator)

    @property
    def samples_per_symbol(self) -> float:
        """``P / Q`` as a float."""
        return self.samples / self.symbols

    def locate(self, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Symbol index and phase of samples: ``n Q / P = k + r / P`` with ``0 <= r < P``.

        Parameters
        ----------
        n : numpy.ndarray
            int64 sample indices >= 0.

        Returns
        -------
        k, r : numpy.ndarray
            int64 symbol index ``floor(n Q / P)`` and remainder ``r`` (the sample phase is
            ``r / P`` of a symbol).
        """
        q, rem = np.divmod(n, self.samples)
        rq = rem * self.symbols
        return q * self.symbols + rq // self.samples, rq % self.samples

    def first_sample(self, numerator: int, denominator: int = 1) -> int:
        """Index of the first sample at or after symbol time ``numerator / denominator``."""
        return -(-(numerator * self.samples) // (denominator * self.symbols))

    def symbols_covering(self, n_samples: int) -> int:
        """Fewest symbols whose periods cover samples ``0 .. n_samples - 1``."""
        return -(-(n_samples * self.symbols) // self.samples)


@dataclass(frozen=True)
class Modulator:
    """A designed modulator (see :func:`design_modulator`); apply it with :func:`modulate`."""

    modulation: str
    pulse: str
    clock: SymbolClock
    memory: int
    deviation_cycles: float
    #: Pulse weights ``w[j, r]`` for symbol age ``j`` and sample phase ``r / P``: amplitude
    #: pulse for ook/psk, running phase pulse for 2fsk. None when evaluated on the fly.
    table: np.ndarray | None = field(repr=False)
    amplitude_scale: float = field(repr=False)
    rolloff: float = 0.0
    bt: float = 0.0

    @property
    def bits_per_symbol(self) -> int:
        """Bits carried by one symbol."""
        return BITS_PER_SYMBOL[self.modulation]

    @property
    def delay_symbols(self) -> float:
        """Delay of a symbol's pulse centre past the centre of its own symbol period."""
        return (self.memory - 1) / 2.0

    def symbol_start_sample(self, k: int) -> int:
        """First sample of symbol ``k``'s period after the pulse delay.

        This is ``ceil((k + delay_symbols) * sps)``: where a receiver sees symbol ``k`` begin.
        """
        return self.clock.first_sample(2 * k + self.memory - 1, 2)

    def weights(self, rem: np.ndarray) -> np.ndarray:
        """Pulse weights ``(memory, len(rem))`` for the sample phases ``rem / P``."""
        if self.table is not None:
            return self.table[:, rem]
        return _pulse_weights(self.modulation, self.pulse, self.memory, self.rolloff, self.bt,
                              rem / self.clock.samples, self.amplitude_scale)


@dataclass(frozen=True)
class ModulatorState:
    """Where a modulator stands between calls (lfilter-style ``zi`` / ``zf``).

    Parameters
    ----------
    symbols_in : int
        Symbols consumed so far.
    samples_out : int
        Samples produced so far (the next output sample's index).
    levels : numpy.ndarray
        complex128 amplitude (ook/psk) or envelope (2fsk) of the last ``memory - 1`` symbols,
        oldest first.
    freqs : numpy.ndarray
        int64 frequency sign (-1, 0, +1; 2fsk only) of the same symbols.
    phase_step : int
        PSK carrier phase of the last symbol, in units of pi/4 (0..7).
    freq_sum : int
        2fsk: sum of the frequency signs of every symbol older than ``freqs``.
    """

    symbols_in: int
    samples_out: int
    levels: np.ndarray = field(repr=False)
    freqs: np.ndarray = field(repr=False)
    phase_step: int = 0
    freq_sum: int = 0


def _rrc_energy(span: int, rolloff: float) -> float:
    """Energy of the RRC pulse truncated to ``span`` symbols (midpoint rule)."""
    n = span * _ENERGY_POINTS_PER_SYMBOL
    t = (np.arange(n) + 0.5) / _ENERGY_POINTS_PER_SYMBOL - span / 2.0
    return float(np.sum(rrc_pulse(t, rolloff) ** 2) / _ENERGY_POINTS_PER_SYMBOL)


def _pulse_weights(modulation: str, pulse: str, memory: int, rolloff: float, bt: float,
                   phase: np.ndarray, scale: float) -> np.ndarray:
    """Causal pulse (or running phase pulse) at ``phase + j``, ``j = 0 .. memory - 1`` (rows)."""
    centre = memory / 2.0
    if pulse == "rrc":
        return rrc_pulse_grid(phase, np.arange(memory, dtype=np.float64) - centre,
                              rolloff) * scale
    tau = phase[None, :] + np.arange(memory, dtype=np.float64)[:, None]
    if pulse == "rect":
        return tau if modulation == "2fsk" else np.ones_like(tau)
    lo, hi = gaussian_phase_pulse(np.array([-centre, centre]), bt)
    return (gaussian_phase_pulse(tau - centre, bt) - lo) / (hi - lo)


def design_modulator(modulation: str, symbol_rate: float, sample_rate: float,
                     pulse: str = "rect", rolloff: float = 0.35, bt: float = 0.5,
                     span_symbols: int = 8, deviation_hz: float | None = None) -> Modulator:
    """Check the settings and precompute a modulator.

    Parameters
    ----------
    modulation : {"ook", "2fsk", "dbpsk", "dqpsk"}
        The keying.
    symbol_rate : float
        Symbols per second as transmitted (include any clock error here).
    sample_rate : float
        Output samples per second; ``sample_rate / symbol_rate`` may be any value >= 1.
    pulse : {"rect", "rrc", "gaussian"}
        Pulse shape: ``rrc`` for ook, dbpsk and dqpsk; ``gaussian`` (GFSK) for 2fsk.
    rolloff : float
        RRC roll-off factor, 0 .. 1.
    bt : float
        GFSK Gaussian filter bandwidth-time product, > 0.
    span_symbols : int
        Length of RRC and Gaussian pulses in symbols (truncation), >= 1.
    deviation_hz : float or None
        2fsk peak deviation: tones at -deviation (bit 0) and +deviation (bit 1), spaced
        ``2 * deviation_hz``. None: half the symbol rate (tone spacing equal to the symbol rate,
        the closest spacing that keeps the tones orthogonal for noncoherent detection [1]_).

    Returns
    -------
    Modulator

    Raises
    ------
    ValueError
        Naming the bad parameter and its value.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008
       (chapter 3, orthogonality of FSK signals; chapter from memory).
    """
    if modulation not in MODULATIONS:
        raise ValueError(f"modulation must be one of {', '.join(MODULATIONS)} "
                         f"(got {modulation!r})")
    if pulse not in PULSES:
        raise ValueError(f"pulse must be one of {', '.join(PULSES)} (got {pulse!r})")
    if pulse == "rrc" and modulation == "2fsk":
        raise ValueError("pulse 'rrc' is for ook, dbpsk and dqpsk (got modulation '2fsk'; "
                         "use pulse 'gaussian' for GFSK)")
    if pulse == "gaussian" and modulation != "2fsk":
        raise ValueError(f"pulse 'gaussian' is for 2fsk (got modulation {modulation!r})")
    rolloff, bt, span_symbols = _check_rolloff(rolloff), _check_bt(bt), _check_span(span_symbols)
    clock = SymbolClock.from_rates(symbol_rate, sample_rate)
    realised_rate = sample_rate * clock.symbols / clock.samples
    deviation_cycles = 0.0
    if modulation == "2fsk":
        dev = realised_rate / 2.0 if deviation_hz is None else float(deviation_hz)
        if not (math.isfinite(dev) and 0 < dev < sample_rate / 2):
            raise ValueError(f"deviation_hz must be > 0 and below half the sample rate "
                             f"{sample_rate / 2:g} Hz (got {dev!r})")
        deviation_cycles = dev / realised_rate
    memory = 1 if pulse == "rect" else int(span_symbols)
    scale = 1.0 / math.sqrt(_rrc_energy(memory, rolloff)) if pulse == "rrc" else 1.0
    table = None
    if pulse != "rect" and clock.samples * memory <= _MAX_TABLE_CELLS:
        phases = np.arange(clock.samples, dtype=np.float64) / clock.samples
        table = _pulse_weights(modulation, pulse, memory, rolloff, bt, phases, scale)
        table.setflags(write=False)
    return Modulator(modulation, pulse, clock, memory, deviation_cycles, table, scale,
                     float(rolloff), float(bt))


def bits_to_symbols(bits: np.ndarray, modulation: str) -> np.ndarray:
    """Group bits into symbol codes.

    Parameters
    ----------
    bits : numpy.ndarray
        uint8 bits (0/1) in transmission order; for dqpsk an even number.
    modulation : str
        One of ``MODULATIONS``.

    Returns
    -------
    numpy.ndarray
        int8 codes: the bit itself for ook, 2fsk and dbpsk; ``2 * first + second`` (0..3)
        for each dqpsk dibit.
    """
    b = np.asarray(bits, dtype=np.int8)
    if BITS_PER_SYMBOL[modulation] == 1:
        return b
    if b.shape[0] % 2:
        raise ValueError(f"dqpsk needs an even number of bits (got {b.shape[0]})")
    return (2 * b[0::2] + b[1::2]).astype(np.int8)


def _initial_state(mod: Modulator) -> ModulatorState:
    hist = mod.memory - 1
    return ModulatorState(0, 0, np.zeros(hist, np.complex128), np.zeros(hist, np.int64))


_EIGHTH_TURNS = np.exp(1j * np.pi / 4 * np.arange(8))


def _symbol_levels(codes: np.ndarray, mod: Modulator, phase_step: int,
                   ) -> tuple[np.ndarray, np.ndarray, int]:
    """Per-symbol amplitude (or FSK envelope), FSK frequency sign, and the final PSK phase."""
    on = codes != SILENT
    freqs = np.zeros(codes.shape[0], np.int64)
    if mod.modulation == "ook":
        levels = np.where(codes == 1, math.sqrt(2.0), 0.0).astype(np.complex128)
    elif mod.modulation == "2fsk":
        levels = on.astype(np.complex128)
        freqs = np.where(on, 2 * codes.astype(np.int64) - 1, 0)
    else:
        if mod.modulation == "dbpsk":
            steps = np.where(codes == 1, 4, 0)
        else:
            steps = np.take(np.array(DQPSK_PHASE_STEPS), np.where(on, codes, 0))
        steps = np.where(on, steps, 0)
        phases = (phase_step + np.cumsum(steps)) % 8
        levels = np.where(on, _EIGHTH_TURNS[phases], 0.0)
        if phases.shape[0]:
            phase_step = int(phases[-1])
    return levels, freqs, phase_step


def modulate(symbols: np.ndarray, mod: Modulator, state: ModulatorState | None = None,
             ) -> tuple[np.ndarray, ModulatorState]:
    """Modulate symbol codes into complex baseband samples.

    Parameters
    ----------
    symbols : numpy.ndarray
        int symbol codes (see :func:`bits_to_symbols`) or ``SILENT``.
    mod : Modulator
        From :func:`design_modulator`.
    state : ModulatorState or None
        The state returned by the previous call; None at the start of the stream (the
        symbols before the first one are silent).

    Returns
    -------
    samples : numpy.ndarray
        complex64: every sample whose symbol time ``n Q / P`` is below the number of symbols
        consumed so far, i.e. samples ``ceil(K0 P / Q) .. ceil(K1 P / Q) - 1`` for symbols
        ``K0 .. K1 - 1``. Feeding ``memory - 1`` further ``SILENT`` symbols completes the
        pulse tails.
    state : ModulatorState
        Continue with it; any split of a symbol sequence gives the same samples.

    Notes
    -----
    Amplitude keyings: ``s(t) = sum_k a_k p(t - k)`` with the causal pulse ``p``; DBPSK steps
    the phase by pi for a 1, pi/4-DQPSK by ``DQPSK_PHASE_STEPS`` [1]_ (section 4.5, differential
    phase modulation; section from memory). 2-FSK is continuous-phase FSK [1]_ (section 3.3):
    ``s(t) = exp(j 2 pi f_d T sum_k d_k q(t - k))`` with ``d_k = +/-1`` and ``q`` the running
    integral of the frequency pulse (a unit ramp over one symbol, or the Gaussian phase pulse
    for GFSK [2]_), so the phase is continuous and the frequency is ``+/- f_d`` inside a
    rectangular symbol.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    .. [2] K. Murota and K. Hirade, "GMSK modulation for digital mobile radio telephony",
       IEEE Trans. Commun. 29(7), 1044-1050, 1981.
    """
    if state is None:
        state = _initial_state(mod)
    codes = np.asarray(symbols)
    if codes.ndim != 1:
        raise ValueError(f"symbols must be one-dimensional (got shape {codes.shape})")
    top = 3 if mod.modulation == "dqpsk" else 1
    if codes.size and (codes.min() < SILENT or codes.max() > top):
        raise ValueError(f"symbol codes for {mod.modulation} must be in -1 .. {top} "
                         f"(got {codes.min()} .. {codes.max()})")
    levels, freqs, phase_step = _symbol_levels(codes, mod, state.phase_step)
    hist = mod.memory - 1
    ext_levels = np.concatenate([state.levels, levels])
    ext_freqs = np.concatenate([state.freqs, freqs])
    first_symbol = state.symbols_in - hist          # symbol index of ext_*[0]
    total = state.symbols_in + codes.shape[0]
    end = mod.clock.first_sample(total)
    n = np.arange(state.samples_out, end, dtype=np.int64)
    k, rem = mod.clock.locate(n)
    w = mod.weights(rem)
    idx = k - first_symbol                           # ext index of each sample's newest symbol
    if mod.modulation == "2fsk":
        # Frequency signs summed over every symbol older than each sample's window.
        before = state.freq_sum + np.concatenate([[0], np.cumsum(ext_freqs)])
        cycles = np.mod(mod.deviation_cycles * before[idx - hist], 1.0)
        ramp = np.zeros(n.shape[0])
        for j in range(mod.memory):
            ramp += ext_freqs[idx - j] * w[j]
        cycles = cycles + mod.deviation_cycles * ramp
        # Envelope of the symbol whose delayed period holds the sample.
        env_k = (2 * rem - hist * mod.clock.samples) // (2 * mod.clock.samples)
        # cycles stays within a few turns, so single precision keeps the phase to ~1e-6 rad.
        turn = (2 * np.pi * cycles).astype(np.float32)
        y = ext_levels[idx + env_k].real.astype(np.float32) * np.exp(1j * turn)
        freq_sum = int(before[ext_freqs.shape[0] - hist])
    else:
        y = np.zeros(n.shape[0], np.complex128)
        for j in range(mod.memory):
            y += ext_levels[idx - j] * w[j]
        freq_sum = 0
    keep = ext_levels.shape[0] - hist
    new_state = ModulatorState(total, end, ext_levels[keep:].copy(), ext_freqs[keep:].copy(),
                               phase_step, freq_sum)
    return y.astype(np.complex64), new_state
