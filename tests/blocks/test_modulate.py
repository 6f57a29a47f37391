"""Pulse shapes and modulator kernels against published definitions and reference libraries."""

from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from scipy.signal.windows import gaussian as scipy_gaussian_window
from scipy.special import erf

from blocks._modulate import (
    DQPSK_PHASE_STEPS,
    SILENT,
    ModulatorState,
    SymbolClock,
    bits_to_symbols,
    design_modulator,
    modulate,
)
from blocks._prbs import prbs_sequence
from blocks._pulses import (
    gaussian_frequency_pulse,
    gaussian_phase_pulse,
    gaussian_taps,
    rect_taps,
    rrc_pulse,
    rrc_pulse_grid,
    rrc_taps,
)

RNG = np.random.default_rng(20240611)


def raised_cosine_spectrum(f: np.ndarray, beta: float) -> np.ndarray:
    """X_rc(f) with T = 1: Proakis & Salehi, Digital Communications 5th ed., section 9.2."""
    af = np.abs(f)
    lo, hi = (1 - beta) / 2, (1 + beta) / 2
    mid = 0.5 * (1 + np.cos(np.pi / beta * (af - lo))) if beta > 0 else np.zeros_like(af)
    return np.where(af <= lo, 1.0, np.where(af <= hi, mid, 0.0))


# -- root-raised cosine ---------------------------------------------------------------------

@pytest.mark.parametrize("beta", [0.2, 0.35, 0.5, 1.0])
def test_rrc_special_points(beta):
    # Closed-form limits at t = 0 and t = T/(4 beta) (Harris, Multirate Signal Processing
    # for Communication Systems, ch. 4; values from memory), and continuity of the quotient
    # on both sides of the singular instants, which checks the limits independently.
    x = np.pi / (4 * beta)
    at_quarter = beta / math.sqrt(2) * ((1 + 2 / np.pi) * math.sin(x)
                                        + (1 - 2 / np.pi) * math.cos(x))
    got = rrc_pulse(np.array([0.0, 1 / (4 * beta), -1 / (4 * beta)]), beta)
    np.testing.assert_allclose(got, [1 - beta + 4 * beta / np.pi, at_quarter, at_quarter],
                               rtol=1e-12)
    near = rrc_pulse(np.array([1e-5, 1 / (4 * beta) - 1e-5, 1 / (4 * beta) + 1e-5]), beta)
    np.testing.assert_allclose(near, got[[0, 1, 1]], atol=1e-4)


@pytest.mark.parametrize("beta", [0.0, 0.25, 0.35, 1.0])
def test_rrc_grid_matches_the_closed_form(beta):
    # The grid form (angle-addition expansion) against the closed form above, on random
    # phases, on the singular instants and just beside them, for integer and half-integer
    # offsets; within 1e-8 of the peak, far below complex64 resolution.
    phases = [RNG.uniform(0, 1, 2000), [0.0, 1e-9, 1 - 1e-9, 0.5, 0.5 + 2e-8]]
    if beta > 0:
        quarter = (0.25 / beta) % 1.0
        phases.append(quarter + np.array([0.0, 5e-9, -5e-9, 2e-8, -2e-8, 1e-6]))
    phase = np.concatenate(phases)
    for offsets in (np.arange(8) - 4.0, np.arange(7) - 3.5):
        exact = rrc_pulse(offsets[:, None] + phase[None, :], beta)
        grid = rrc_pulse_grid(phase, offsets, beta)
        assert np.all(np.isfinite(grid))
        np.testing.assert_allclose(grid, exact, rtol=0, atol=1e-8 * (1 - beta + 4 * beta / np.pi))


@pytest.mark.parametrize("beta", [0.25, 0.5, 0.9])
def test_rrc_spectrum_is_root_of_raised_cosine(beta):
    # Fourier transform of the pulse equals sqrt(X_rc(f)) (Proakis & Salehi 5th ed., 9.2).
    dt = 1 / 64
    t = np.arange(-60, 60, dt) + dt / 2
    p = rrc_pulse(t, beta)
    f = np.linspace(-0.9, 0.9, 73)
    spectrum = (np.exp(-2j * np.pi * f[:, None] * t[None, :]) @ p) * dt
    np.testing.assert_allclose(spectrum.real, np.sqrt(raised_cosine_spectrum(f, beta)),
                               atol=6e-3)
    # Unit energy (Parseval with X_rc integrating to 1).
    assert np.sum(p**2) * dt == pytest.approx(1.0, abs=2e-3)


@pytest.mark.parametrize(("sps", "beta"), [(8, 0.35), (5, 0.5), (4, 0.25)])
def test_rrc_cascade_has_no_intersymbol_interference(sps, beta):
    # RRC * RRC is a raised cosine: zero at every nonzero multiple of T (Nyquist criterion,
    # Proakis & Salehi 5th ed., section 9.2). Residual from truncation to 24 symbols.
    h = rrc_taps(sps, beta, 24)
    assert len(h) % 2 == 1
    np.testing.assert_allclose(h, h[::-1], rtol=0, atol=1e-15)
    assert np.sum(h**2) == pytest.approx(1.0)
    rc = np.convolve(h, h)
    centre = len(rc) // 2
    lags = centre + sps * np.arange(-10, 11)
    expect = np.zeros(21)
    expect[10] = 1.0
    np.testing.assert_allclose(rc[lags], expect, atol=4e-3)


def test_tap_designers_reject_bad_arguments():
    with pytest.raises(ValueError, match="sps"):
        rrc_taps(0.5, 0.35, 8)
    with pytest.raises(ValueError, match="rolloff"):
        rrc_taps(4, 1.5, 8)
    with pytest.raises(ValueError, match="span_symbols"):
        rrc_taps(4, 0.35, 0)
    with pytest.raises(ValueError, match="bt"):
        gaussian_taps(4, 0.0, 4)


# -- Gaussian and rectangular ---------------------------------------------------------------

@pytest.mark.parametrize(("sps", "bt"), [(8, 0.5), (10, 0.3), (4.0, 1.0)])
def test_gaussian_taps_match_scipy_window(sps, bt):
    # Reference library: scipy.signal.windows.gaussian with the standard deviation of the
    # GMSK premodulation filter, sqrt(ln 2) / (2 pi BT) symbols (Murota & Hirade 1981).
    taps = gaussian_taps(sps, bt, 4)
    std = sps * math.sqrt(math.log(2)) / (2 * math.pi * bt)
    ref = scipy_gaussian_window(len(taps), std)
    np.testing.assert_allclose(taps, ref / ref.sum(), rtol=1e-12)


@pytest.mark.parametrize("bt", [0.3, 0.5, 1.0])
def test_gaussian_frequency_pulse_is_filtered_rectangle(bt):
    # g = rect * h (Murota & Hirade 1981): numerical convolution of the unit-area Gaussian
    # with a one-symbol rectangle; its area is 1 and the running integral goes 0 -> 1.
    dt = 1 / 200
    t = np.arange(-4, 4 + dt / 2, dt)
    h = gaussian_taps(1 / dt, bt, 8) / dt          # unit area density on the same grid
    rect = np.where(np.abs(t) < 0.5 - dt / 2, 1.0, 0.0)
    rect[np.isclose(np.abs(t), 0.5)] = 0.5          # trapezoid weight at the edges
    conv = np.convolve(rect, h, mode="same") * dt
    np.testing.assert_allclose(gaussian_frequency_pulse(t, bt), conv, atol=1e-4)
    g = gaussian_frequency_pulse(t, bt)
    assert np.sum(g) * dt == pytest.approx(1.0, abs=1e-6)
    big = gaussian_phase_pulse(t, bt)
    np.testing.assert_allclose(np.gradient(big, dt), g, atol=1e-4)
    assert big[0] == pytest.approx(0.0, abs=1e-9)
    assert big[-1] == pytest.approx(1.0, abs=1e-9)


def test_rect_taps_unit_energy():
    # Matched filter of an NRZ pulse (common practice): equal taps, one symbol long.
    np.testing.assert_allclose(rect_taps(4), np.full(4, 0.5))
    assert len(rect_taps(6.6)) == 7
    assert np.sum(rect_taps(6.6) ** 2) == pytest.approx(1.0)


# -- symbol clock -------------------------------------------------------------------------

def test_symbol_clock_is_exact_over_long_runs():
    # Sample n belongs to symbol floor(n * Rs / fs): exact rational arithmetic as the
    # reference (common practice), checked near sample 10**13.
    clock = SymbolClock.from_rates(9600.0, 1_000_000.0)
    assert (clock.symbols, clock.samples) == (6, 625)
    n = np.arange(10**13, 10**13 + 5000, dtype=np.int64)
    k, rem = clock.locate(n)
    ratio = Fraction(9600, 1_000_000)
    ref = [(int(v * ratio), (v * ratio - int(v * ratio)) * 625) for v in n.tolist()]
    assert k.tolist() == [a for a, _ in ref]
    assert rem.tolist() == [int(b) for _, b in ref]


def test_symbol_clock_rejects_too_low_sample_rate():
    with pytest.raises(ValueError, match="sample_rate"):
        SymbolClock.from_rates(1000.0, 500.0)


# -- modulators ---------------------------------------------------------------------------

CASES = [
    ("ook", "rect", {}), ("ook", "rrc", {"rolloff": 0.35}),
    ("2fsk", "rect", {}), ("2fsk", "gaussian", {"bt": 0.5}),
    ("dbpsk", "rect", {}), ("dbpsk", "rrc", {"rolloff": 0.5}),
    ("dqpsk", "rect", {}), ("dqpsk", "rrc", {"rolloff": 0.35}),
]


def random_codes(modulation: str, count: int, silent_every: int = 0) -> np.ndarray:
    codes = RNG.integers(0, 4 if modulation == "dqpsk" else 2, count).astype(np.int8)
    if silent_every:
        codes[::silent_every] = SILENT
    return codes


@pytest.mark.parametrize(("modulation", "pulse", "extra"), CASES)
@pytest.mark.parametrize("sps", [2.0, 5.5, 104.0 + 1 / 6, 7.31])
def test_modulator_is_chunk_invariant(modulation, pulse, extra, sps):
    # Chunk-size invariance (project convention): any split of the symbols, same samples.
    fs = 1_000_000.0
    mod = design_modulator(modulation, fs / sps, fs, pulse=pulse, **extra)
    codes = random_codes(modulation, 600, silent_every=37)
    whole, end = modulate(codes, mod)
    cuts = [0, 1, 2, 3, 50, 51, 300, 599, 600]
    state, parts = None, []
    for a, b in itertools.pairwise(cuts):
        y, state = modulate(codes[a:b], mod, state)
        parts.append(y)
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    assert whole.dtype == np.complex64
    assert end.samples_out == state.samples_out == mod.clock.first_sample(600)


@pytest.mark.parametrize(("modulation", "pulse", "extra"), CASES)
@pytest.mark.parametrize("sps", [2.0, 6.25, 9.0])
def test_unit_average_power_while_transmitting(modulation, pulse, extra, sps):
    # Average power 1 for equiprobable symbols: E|a|^2 = 1 with unit-energy pulses, or unit
    # envelope (definition of the average signal power, Proakis & Salehi 5th ed., ch. 3).
    # Bits: whole periods of the ITU-T O.150 2^9-1 sequence, balanced to 256 ones in 511.
    mod = design_modulator(modulation, 1000.0 / sps, 1000.0, pulse=pulse, **extra)
    bits, _ = prbs_sequence("prbs9", 511 * 40)
    y, _ = modulate(bits_to_symbols(bits, modulation), mod)
    edge = int(mod.memory * sps)
    power = np.mean(np.abs(y[edge:-edge].astype(np.complex128)) ** 2)
    assert 10 * math.log10(power) == pytest.approx(0.0, abs=0.05)


def test_dqpsk_steps_are_the_gray_table():
    # pi/4-DQPSK: 00 -> +pi/4, 01 -> +3pi/4, 11 -> -3pi/4, 10 -> -pi/4, the table of ETSI
    # EN 300 392-2 clause 5.5.2 (from memory). Symbol-centre samples of rect pulses.
    sps = 8
    mod = design_modulator("dqpsk", 1000.0, 1000.0 * sps)
    bits = RNG.integers(0, 2, 400).astype(np.uint8)
    codes = bits_to_symbols(bits, "dqpsk")
    y, _ = modulate(codes, mod)
    centres = y[sps // 2::sps]
    steps = np.angle(centres[1:] * np.conj(centres[:-1]))
    table = {(0, 0): np.pi / 4, (0, 1): 3 * np.pi / 4, (1, 1): -3 * np.pi / 4,
             (1, 0): -np.pi / 4}
    expect = [table[(int(a), int(b))] for a, b in zip(bits[2::2], bits[3::2], strict=True)]
    np.testing.assert_allclose(steps, expect, atol=1e-6)
    # The first symbol steps from phase 0.
    assert np.angle(centres[0]) == pytest.approx(table[(int(bits[0]), int(bits[1]))])
    np.testing.assert_allclose(np.abs(centres), 1.0, rtol=1e-6)
    assert np.pi / 4 * np.array(DQPSK_PHASE_STEPS) == pytest.approx(
        [table[(0, 0)], table[(0, 1)], table[(1, 0)], table[(1, 1)]])


def test_dbpsk_one_flips_the_phase():
    # Differential encoding of DBPSK: a 1 steps the phase by pi, a 0 keeps it (common
    # practice; Proakis & Salehi 5th ed., differential PSK).
    sps = 4
    mod = design_modulator("dbpsk", 100.0, 100.0 * sps)
    bits = RNG.integers(0, 2, 300).astype(np.int8)
    y, _ = modulate(bits, mod)
    centres = y[sps // 2::sps].astype(np.complex128)
    products = (centres[1:] * np.conj(centres[:-1])).real
    np.testing.assert_allclose(products, np.where(bits[1:] == 1, -1.0, 1.0), atol=1e-6)


def test_ook_levels_and_symbol_boundaries_are_exact():
    # Symbol k owns samples ceil(k sps) .. ceil((k+1) sps) - 1 (exact rational reference),
    # also 10**12 symbols into a run; OOK sends sqrt(2) for a 1, 0 for a 0.
    fs, rs = 1_000_000.0, 9600.0
    mod = design_modulator("ook", rs, fs)
    codes = random_codes("ook", 3000)
    k0 = 10**12
    state = ModulatorState(k0, mod.clock.first_sample(k0), np.zeros(0, np.complex128),
                           np.zeros(0, np.int64))
    y, end = modulate(codes, mod, state)
    n = np.arange(state.samples_out, end.samples_out)
    owner = np.array([int(Fraction(int(v)) * Fraction(6, 625)) - k0 for v in n])
    np.testing.assert_array_equal(np.abs(y) > 1, codes[owner] == 1)
    np.testing.assert_allclose(np.abs(y[codes[owner] == 1]), math.sqrt(2), rtol=1e-6)
    assert end.samples_out == math.ceil(Fraction(k0 + 3000) * Fraction(625, 6))


@pytest.mark.parametrize("sps", [8.0, 13.7])
def test_cpfsk_frequency_is_plus_minus_deviation(sps):
    # Continuous-phase FSK with rectangular frequency pulses: the instantaneous frequency is
    # +deviation for a 1 and -deviation for a 0 inside each symbol, and the phase never jumps
    # (Proakis & Salehi 5th ed., CPFSK, section 3.3 from memory).
    fs = 48_000.0
    rs = fs / sps
    dev = 0.8 * rs
    mod = design_modulator("2fsk", rs, fs, deviation_hz=dev)
    codes = random_codes("2fsk", 500)
    y, _ = modulate(codes, mod)
    freq = np.angle(y[1:] * np.conj(y[:-1])) * fs / (2 * np.pi)
    k, _ = mod.clock.locate(np.arange(len(y), dtype=np.int64))
    inside = k[1:] == k[:-1]                       # both samples in the same symbol
    expect = np.where(codes[k[:-1]] == 1, dev, -dev)
    np.testing.assert_allclose(freq[inside], expect[inside], atol=1e-3 * dev)
    assert np.max(np.abs(freq)) <= dev * (1 + 1e-3)   # no phase jump at boundaries
    np.testing.assert_allclose(np.abs(y), 1.0, rtol=1e-6)


@pytest.mark.parametrize("bt", [0.3, 0.5])
def test_gfsk_frequency_of_runs_and_isolated_bits(bt):
    # GFSK (Murota & Hirade 1981): a long run of equal bits reaches the full deviation; an
    # isolated bit peaks at deviation x (1 - 2 Q(pi BT / sqrt(ln 2))) = deviation x
    # erf(pi BT / sqrt(2 ln 2)), the centre value of the Gaussian-filtered rectangle.
    sps, fs = 64, 64_000.0            # fine sampling: a phase step ~ instantaneous frequency
    rs = fs / sps
    dev = rs / 2
    mod = design_modulator("2fsk", rs, fs, pulse="gaussian", bt=bt, span_symbols=8)
    codes = np.array([0] * 20 + [1] + [0] * 20 + [1] * 20, np.int8)
    y, _ = modulate(codes, mod)
    freq = np.angle(y[1:] * np.conj(y[:-1])) * fs / (2 * np.pi)
    delay = int(mod.delay_symbols * sps)
    run0 = freq[delay + 8 * sps: delay + 12 * sps]
    run1 = freq[delay + 50 * sps: delay + 58 * sps]
    np.testing.assert_allclose(run0, -dev, rtol=1e-3)
    np.testing.assert_allclose(run1, dev, rtol=1e-3)
    lone = freq[delay + 18 * sps: delay + 24 * sps]
    # Centre of the isolated +1 within a run of -1: -dev + 2 dev g(0).
    g0 = erf(np.pi * bt / math.sqrt(2 * math.log(2)))
    assert lone.max() == pytest.approx(-dev + 2 * dev * g0, rel=1e-3)


def test_silent_symbols_send_nothing():
    mod = design_modulator("2fsk", 1000.0, 8000.0)
    y, _ = modulate(np.array([1, SILENT, SILENT, 0], np.int8), mod)
    np.testing.assert_array_equal(y[8:24], 0)
    assert np.all(np.abs(y[:8]) > 0.99) and np.all(np.abs(y[24:]) > 0.99)


def test_bits_to_symbols_pairs_msb_first():
    codes = bits_to_symbols(np.array([0, 0, 0, 1, 1, 0, 1, 1], np.uint8), "dqpsk")
    np.testing.assert_array_equal(codes, [0, 1, 2, 3])
    with pytest.raises(ValueError, match="even"):
        bits_to_symbols(np.array([1, 0, 1], np.uint8), "dqpsk")


@pytest.mark.parametrize(("kwargs", "name"), [
    ({"modulation": "qam16"}, "modulation"),
    ({"modulation": "2fsk", "pulse": "rrc"}, "rrc"),
    ({"modulation": "ook", "pulse": "gaussian"}, "gaussian"),
    ({"modulation": "dbpsk", "pulse": "rrc", "rolloff": 1.5}, "rolloff"),
    ({"modulation": "2fsk", "deviation_hz": 6000.0}, "deviation_hz"),
    ({"modulation": "ook", "symbol_rate": 0.0}, "symbol_rate"),
    ({"modulation": "ook", "symbol_rate": 20_000.0}, "sample_rate"),
])
def test_design_modulator_errors_name_the_parameter(kwargs, name):
    args = {"symbol_rate": 1000.0, "sample_rate": 10_000.0, **kwargs}
    with pytest.raises(ValueError, match=name):
        design_modulator(args.pop("modulation"), args.pop("symbol_rate"),
                         args.pop("sample_rate"), **args)


def test_modulate_rejects_bad_codes():
    mod = design_modulator("dbpsk", 1000.0, 4000.0)
    with pytest.raises(ValueError, match="symbol codes"):
        modulate(np.array([0, 2], np.int8), mod)
