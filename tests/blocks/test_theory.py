"""Bit error theory against tables, independent integrals and seeded Monte-Carlo runs."""

import math

import numpy as np
import pytest
from scipy import integrate, optimize, special, stats

from blocks._theory import (
    SCHEMES,
    ber_theory,
    ebn0_for_ber,
    marcum_q1,
    ook_ber_at_threshold,
    ook_optimum_threshold,
)


def db(x: float) -> float:
    return 10.0 * math.log10(x)


# -- coherent references ------------------------------------------------------------------

# Standard normal tail Q(x) for x = 1, 2, 3: Abramowitz & Stegun, Handbook of Mathematical
# Functions (1964), Table 26.1 (1 - P(x)); values from memory of the table, 9 digits.
Q_TABLE = {1.0: 0.158655254, 2.0: 0.022750132, 3.0: 0.001349898}


@pytest.mark.parametrize(("x", "q"), Q_TABLE.items())
def test_coherent_schemes_match_the_normal_table(x, q):
    # Proakis & Salehi 5th ed. ch. 4: BPSK Pb = Q(sqrt(2 Eb/N0)); coherent orthogonal
    # BFSK Pb = Q(sqrt(Eb/N0)).
    assert float(ber_theory("bpsk", db(x * x / 2))) == pytest.approx(q, abs=6e-10)
    assert float(ber_theory("coherent-2fsk", db(x * x))) == pytest.approx(q, abs=6e-10)


def test_bpsk_textbook_operating_points():
    # Widely tabulated (from memory): BPSK needs 9.59 dB for 1e-5 and gives 3.87e-6 at 10 dB.
    assert ebn0_for_ber("bpsk", 1e-5) == pytest.approx(9.59, abs=0.005)
    assert float(ber_theory("bpsk", 10.0)) == pytest.approx(3.872e-6, rel=1e-3)


# -- noncoherent FSK and OOK against the envelope densities (scipy.stats) -----------------

def rice_rayleigh_2fsk(gamma: float) -> float:
    """P(Rayleigh envelope > Rice envelope), by quadrature over scipy.stats densities.

    Matched-filter model (Proakis & Salehi sec. 4.5): the signalled branch's envelope is Rice
    with nu = sqrt(Eb), the other branch's is Rayleigh, both with sigma^2 = N0/2.
    """
    sigma = math.sqrt(0.5 / gamma)  # Eb = 1
    rice = stats.rice(b=1.0 / sigma, scale=sigma)
    rayleigh = stats.rayleigh(scale=sigma)
    value, _ = integrate.quad(lambda r: rice.pdf(r) * rayleigh.sf(r), 0, np.inf,
                              epsabs=0, epsrel=1e-10, limit=200)
    return value


@pytest.mark.parametrize("ebn0_db", [0.0, 4.0, 8.0, 12.0])
def test_noncoherent_2fsk_equals_envelope_comparison(ebn0_db):
    expected = rice_rayleigh_2fsk(10 ** (ebn0_db / 10))
    assert float(ber_theory("2fsk", ebn0_db)) == pytest.approx(expected, rel=1e-7)


def ook_error_from_densities(gamma: float, threshold: float) -> float:
    """Equal-prior error of an envelope detector: Rayleigh above T plus Rice below T, / 2.

    "On" energy 2 Eb (average Eb), amplitude A = sqrt(2), sigma^2 = N0/2 with Eb = 1;
    threshold as a fraction of A. scipy.stats rice / rayleigh, independent of Marcum Q code.
    """
    amplitude = math.sqrt(2.0)
    sigma = math.sqrt(0.5 / gamma)
    t = threshold * amplitude
    return 0.5 * (stats.rayleigh.sf(t, scale=sigma)
                  + stats.rice.cdf(t, b=amplitude / sigma, scale=sigma))


@pytest.mark.parametrize("ebn0_db", [2.0, 8.0, 13.0])
@pytest.mark.parametrize("threshold", [0.3, 0.5, 0.7])
def test_ook_fixed_threshold_matches_the_densities(ebn0_db, threshold):
    expected = ook_error_from_densities(10 ** (ebn0_db / 10), threshold)
    assert float(ook_ber_at_threshold(ebn0_db, threshold)) == pytest.approx(expected, rel=1e-6)


@pytest.mark.parametrize("ebn0_db", [0.0, 6.0, 12.0])
def test_ook_optimum_is_the_numerical_minimum(ebn0_db):
    gamma = 10 ** (ebn0_db / 10)
    found = optimize.minimize_scalar(lambda t: ook_error_from_densities(gamma, t),
                                     bounds=(0.05, 3.0), method="bounded",
                                     options={"xatol": 1e-9})
    assert float(ook_optimum_threshold(ebn0_db)) == pytest.approx(found.x, abs=1e-4)
    assert float(ber_theory("ook", ebn0_db)) == pytest.approx(found.fun, rel=1e-7)
    for t in (0.4, 0.5, 0.6, 0.9):
        assert float(ber_theory("ook", ebn0_db)) <= float(ook_ber_at_threshold(ebn0_db, t))


def test_ook_threshold_tends_to_half_and_exponent_to_minus_gamma_over_2():
    # High-SNR behaviour (common practice): T -> A/2 and Pb ~ exp(-Eb/(2 N0)) / 2 with Eb the
    # average bit energy, the same exponent as noncoherent 2-FSK.
    assert float(ook_optimum_threshold(40.0)) == pytest.approx(0.5, abs=1e-3)
    gamma = 1000.0
    exponent = math.log(2 * float(ber_theory("ook", db(gamma)))) / (-gamma / 2)
    assert exponent == pytest.approx(1.0, abs=0.01)


def test_marcum_q_against_direct_integration():
    # Definition Q1(a, b) = int_b^inf x exp(-(x^2 + a^2)/2) I0(a x) dx (Marcum 1960),
    # written with the scaled Bessel function i0e(y) = exp(-y) I0(y) to avoid overflow.
    for a, b in [(0.5, 1.0), (2.0, 1.5), (3.0, 5.0)]:
        direct, _ = integrate.quad(
            lambda x, a=a: x * math.exp(-((x - a) ** 2) / 2) * special.i0e(a * x), b, np.inf)
        assert float(marcum_q1(a, b)) == pytest.approx(direct, rel=1e-8)


# -- differential detection ---------------------------------------------------------------

def pawula_dqpsk(gamma: float) -> float:
    """DQPSK (Gray) bit error by the single-integral form of Q1(a,b) - I0(ab)e^-(a2+b2)/2 / 2.

    Pb = 1/(4 pi) int_{-pi}^{pi} (1 - r^2) / (1 + 2 r sin t + r^2)
         * exp(-(b^2/2)(1 + 2 r sin t + r^2)) dt,   r = a/b,
    after R. F. Pawula, S. O. Rice and J. H. Roberts, IEEE Trans. Commun. 30(8), 1982, as
    given in M. K. Simon and M.-S. Alouini, Digital Communication over Fading Channels
    (form from memory; it agrees with the Marcum form to 1e-13 here, which it could not by
    accident).
    """
    a = math.sqrt(2 * gamma * (1 - math.sqrt(0.5)))
    b = math.sqrt(2 * gamma * (1 + math.sqrt(0.5)))
    r = a / b

    def integrand(t):
        s = 1 + 2 * r * math.sin(t) + r * r
        return (1 - r * r) / s * math.exp(-b * b / 2 * s)

    value, _ = integrate.quad(integrand, -math.pi, math.pi, epsabs=0, epsrel=1e-12, limit=200)
    return value / (4 * math.pi)


@pytest.mark.parametrize("ebn0_db", [0.0, 6.0, 12.0, 20.0])
def test_dqpsk_marcum_form_equals_integral_form(ebn0_db):
    assert float(ber_theory("dqpsk", ebn0_db)) == pytest.approx(
        pawula_dqpsk(10 ** (ebn0_db / 10)), rel=1e-9)


def within_exact_interval(errors: int, trials: int, p: float, confidence: float = 0.999):
    """Whether p lies in the Clopper-Pearson interval (scipy.stats.binomtest, method exact)."""
    ci = stats.binomtest(errors, trials, p).proportion_ci(confidence, method="exact")
    return ci.low <= p <= ci.high, (ci.low, ci.high)


def test_dbpsk_monte_carlo():
    # Differential detection of DBPSK: decide on the sign of Re(r_k conj(r_{k-1})) with an
    # unknown constant carrier phase (Proakis & Salehi sec. 4.5, DPSK).
    rng = np.random.default_rng(20240611)
    ebn0_db, n = 7.0, 200_000
    gamma = 10 ** (ebn0_db / 10)
    bits = rng.integers(0, 2, n)
    symbols = np.cumprod(np.concatenate(([1.0], 1.0 - 2.0 * bits)))  # Eb = Es = 1
    noise = rng.normal(scale=math.sqrt(0.5 / gamma), size=(2, n + 1))
    r = symbols * np.exp(1j * rng.uniform(0, 2 * np.pi)) + noise[0] + 1j * noise[1]
    decided = (np.real(r[1:] * np.conj(r[:-1])) < 0).astype(int)
    errors = int(np.count_nonzero(decided != bits))
    ok, ci = within_exact_interval(errors, n, float(ber_theory("dbpsk", ebn0_db)))
    assert ok, (errors, ci)


def test_pi4_dqpsk_monte_carlo():
    # pi/4-DQPSK, Gray mapped phase steps 00 -> +pi/4, 01 -> +3pi/4, 11 -> -3pi/4,
    # 10 -> -pi/4 (common practice), differentially detected; Es = 2 Eb.
    rng = np.random.default_rng(77)
    ebn0_db, n_sym = 8.0, 100_000
    gamma = 10 ** (ebn0_db / 10)
    bits = rng.integers(0, 2, (n_sym, 2))
    step = np.array([[np.pi / 4, 3 * np.pi / 4], [-np.pi / 4, -3 * np.pi / 4]])
    phase = np.cumsum(np.concatenate(([0.0], step[bits[:, 0], bits[:, 1]])))
    noise = rng.normal(scale=math.sqrt(0.5 / gamma), size=(2, n_sym + 1))  # N0 = 1/gamma
    r = math.sqrt(2.0) * np.exp(1j * (phase + 1.3)) + noise[0] + 1j * noise[1]
    z = r[1:] * np.conj(r[:-1])
    decided = np.stack(((np.imag(z) < 0), (np.real(z) < 0)), axis=1).astype(int)
    errors = int(np.count_nonzero(decided != bits))
    ok, ci = within_exact_interval(errors, 2 * n_sym, float(ber_theory("dqpsk", ebn0_db)))
    assert ok, (errors, ci)


def test_noncoherent_fsk_costs_3db_over_dbpsk_at_any_ber():
    # Proakis & Salehi sec. 4.5: exp(-Eb/2N0)/2 vs exp(-Eb/N0)/2, a factor 2 (3.01 dB) in Eb.
    for p in (1e-2, 1e-5, 1e-9):
        assert ebn0_for_ber("2fsk", p) - ebn0_for_ber("dbpsk", p) == pytest.approx(
            db(2.0), abs=1e-8)


# -- inverse and edges --------------------------------------------------------------------

@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("target", [0.3, 1e-3, 1e-6, 1e-12, 1e-200])
def test_inverse_round_trip(scheme, target):
    need = ebn0_for_ber(scheme, target)
    assert float(ber_theory(scheme, need)) == pytest.approx(target, rel=1e-7)


def test_dbpsk_inverse_in_closed_form():
    # exp(-gamma)/2 = p  =>  gamma = ln(1/(2p))
    assert ebn0_for_ber("dbpsk", 1e-4) == pytest.approx(db(math.log(0.5 / 1e-4)), abs=1e-9)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_monotone_and_limits(scheme):
    grid = np.linspace(-10, 20, 61)
    pb = ber_theory(scheme, grid)
    assert pb.shape == grid.shape
    assert np.all(np.diff(pb) < 0)
    assert np.all((pb > 0) & (pb < 0.5))
    np.testing.assert_allclose(ber_theory(scheme, [-np.inf, np.inf]), [0.5, 0.0])


def test_errors_name_the_problem():
    with pytest.raises(ValueError, match="scheme must be one of"):
        ber_theory("qam16", 3.0)
    with pytest.raises(ValueError, match="ebn0_db must not be NaN"):
        ber_theory("bpsk", [1.0, float("nan")])
    with pytest.raises(ValueError, match="target_ber must be in"):
        ebn0_for_ber("bpsk", 0.5)
    with pytest.raises(ValueError, match="target_ber must be in"):
        ebn0_for_ber("bpsk", 0.0)
    with pytest.raises(ValueError, match="target_ber must be in"):
        ebn0_for_ber("bpsk", float("nan"))
    with pytest.raises(ValueError, match=r"too close to 0\.5"):
        ebn0_for_ber("bpsk", 0.49999999)
    with pytest.raises(ValueError, match="threshold must be > 0"):
        ook_ber_at_threshold(10.0, 0.0)
