"""``phasefree budget`` numbers against hand computations from the formulas' sources."""

import argparse
import json
import math

import pytest

from blocks._budget import free_space_loss_db, free_space_range_m, noise_density_dbm_hz
from stream.commands import budget

# kT0 by hand: Boltzmann constant 1.380649e-23 J/K (exact in the 2019 SI, CODATA 2018) at the
# noise-figure reference temperature T0 = 290 K (Friis 1944), in dBm/Hz.
KT0_DBM_HZ = 10 * math.log10(1.380649e-23 * 290 / 1e-3)


def run(capsys, *argv: str) -> tuple[int, str, str]:
    parser = argparse.ArgumentParser(prog="phasefree budget")
    budget.add_arguments(parser)
    code = budget.main(parser.parse_args(list(argv)))
    out, err = capsys.readouterr()
    return code, out, err


def fspl_p525(f_mhz: float, d_km: float) -> float:
    """ITU-R P.525 free-space basic transmission loss, f in MHz and d in km (32.45 dB form)."""
    return 32.45 + 20 * math.log10(f_mhz) + 20 * math.log10(d_km)


def test_kt0_is_minus_174_dbm_per_hz():
    # Common practice: the thermal noise floor at 290 K is -174 dBm/Hz (to 0.03 dB).
    assert noise_density_dbm_hz() == pytest.approx(KT0_DBM_HZ, abs=1e-9)
    assert noise_density_dbm_hz() == pytest.approx(-174.0, abs=0.03)


@pytest.mark.parametrize(("f_mhz", "d_km"), [(433.92, 1.0), (868.3, 12.5), (2450.0, 0.08)])
def test_free_space_loss_matches_p525(f_mhz, d_km):
    assert free_space_loss_db(f_mhz * 1e6, d_km * 1e3) == pytest.approx(
        fspl_p525(f_mhz, d_km), abs=0.005)
    loss = free_space_loss_db(f_mhz * 1e6, d_km * 1e3)
    assert free_space_range_m(loss, f_mhz * 1e6) == pytest.approx(d_km * 1e3, rel=1e-12)


def test_dbpsk_json_against_hand_computation(capsys):
    # Orchard frost sensor uplink sketch: 4.8 kbit/s, BER 1e-4, NF 7 dB, 1.5 dB implementation
    # loss, 14 dBm at 869.5 MHz, 2 dBi + 0 dBi antennas, 12 dB margin.
    code, out, err = run(capsys, "--scheme", "dbpsk", "--bit-rate", "4800", "--target-ber",
                         "1e-4", "--noise-figure", "7", "--loss-db", "1.5", "--tx-power-dbm",
                         "14", "--frequency", "869.5M", "--tx-antenna-dbi", "2",
                         "--rx-antenna-dbi", "0", "--margin-db", "12", "--json")
    assert code == 0, err
    got = json.loads(out)
    # DBPSK: Pb = exp(-Eb/N0)/2 (Proakis & Salehi 5th ed., DPSK) => Eb/N0 = ln(1/(2 Pb))
    ebn0 = 10 * math.log10(math.log(1 / (2 * 1e-4)))
    sens = KT0_DBM_HZ + 7 + 10 * math.log10(4800) + ebn0 + 1.5
    allowed = 14 + 2 + 0 - sens - 12
    # invert the P.525 form: 20 log10 d_km = L - 32.45 - 20 log10 f_MHz
    d_m = 1e3 * 10 ** ((allowed - 32.45 - 20 * math.log10(869.5)) / 20)
    assert got["ebn0_db"] == pytest.approx(ebn0, abs=1e-8)
    assert got["sensitivity_dbm"] == pytest.approx(sens, abs=1e-8)
    assert got["range_m"] == pytest.approx(d_m, rel=5e-4)
    row = got["schemes"]["dbpsk"]
    assert row["ebn0_db"] == pytest.approx(ebn0, abs=1e-8)
    assert row["sensitivity_dbm"] == pytest.approx(sens, abs=1e-8)
    assert "licence" in got["notice"]


def test_table_compares_every_scheme_with_bpsk(capsys):
    code, out, _ = run(capsys, "--scheme", "2fsk", "--bit-rate", "9600", "--target-ber",
                       "1e-5", "--noise-figure", "6", "--json")
    assert code == 0
    got = json.loads(out)
    assert set(got["schemes"]) == {"ook", "2fsk", "dbpsk", "dqpsk", "bpsk", "coherent-2fsk"}
    # BPSK 1e-5 needs 9.59 dB (standard textbook figure, from memory)
    assert got["schemes"]["bpsk"]["ebn0_db"] == pytest.approx(9.59, abs=0.005)
    # noncoherent 2-FSK vs DBPSK: 3.01 dB, as exp(-g/2)/2 vs exp(-g)/2 (Proakis & Salehi)
    fsk, dpsk = got["schemes"]["2fsk"], got["schemes"]["dbpsk"]
    assert fsk["penalty_db"] - dpsk["penalty_db"] == pytest.approx(10 * math.log10(2), abs=1e-7)
    # same bit rate and NF: sensitivities differ exactly by the Eb/N0 difference
    assert fsk["sensitivity_dbm"] - dpsk["sensitivity_dbm"] == pytest.approx(
        fsk["ebn0_db"] - dpsk["ebn0_db"], abs=1e-9)
    # free-space range scales as 10^(-penalty/20) (Friis: loss grows 20 dB per decade)
    assert fsk["range_ratio"] == pytest.approx(10 ** (-fsk["penalty_db"] / 20), rel=1e-12)
    assert got["range_m"] is None and got["link"] is None


def test_text_output_shows_figures_table_and_notice(capsys):
    code, out, _ = run(capsys, "--scheme", "ook", "--bit-rate", "2400", "--target-ber", "1e-3",
                       "--noise-figure", "5", "--tx-power-dbm", "10", "--frequency", "433.92M")
    assert code == 0
    assert "required Eb/N0" in out and "sensitivity" in out and "free-space range" in out
    for scheme in ("ook", "2fsk", "dbpsk", "dqpsk", "bpsk", "coherent-2fsk"):
        assert scheme in out
    assert "local regulations and licensed practice come first" in out


def test_ranges_follow_the_link_equation(capsys):
    code, out, _ = run(capsys, "--scheme", "dqpsk", "--bit-rate", "1000", "--target-ber",
                       "1e-3", "--noise-figure", "4", "--tx-power-dbm", "0", "--frequency",
                       "2.45G", "--json")
    assert code == 0
    got = json.loads(out)
    for row in got["schemes"].values():
        # P_rx at the range equals the sensitivity: P_tx - FSPL(d) = S
        assert 0 - free_space_loss_db(2.45e9, row["range_m"]) == pytest.approx(
            row["sensitivity_dbm"], abs=1e-9)


BASE = ("--scheme", "bpsk", "--bit-rate", "1000", "--target-ber", "1e-3", "--noise-figure", "5")


@pytest.mark.parametrize(("change", "option"), [
    (("--bit-rate", "0"), "--bit-rate"),
    (("--bit-rate", "-9600"), "--bit-rate"),
    (("--bit-rate", "nan"), "--bit-rate"),
    (("--target-ber", "0.5"), "--target-ber"),
    (("--target-ber", "0"), "--target-ber"),
    (("--target-ber", "nan"), "--target-ber"),
    (("--noise-figure", "-1"), "--noise-figure"),
    (("--loss-db", "inf"), "--loss-db"),
    (("--margin-db", "3"), "--margin-db"),
    (("--tx-power-dbm", "10"), "--frequency"),
    (("--tx-power-dbm", "10", "--frequency", "0M"), "--frequency"),
    (("--tx-power-dbm", "nan", "--frequency", "868M"), "--tx-power-dbm"),
])
def test_bad_values_exit_2_naming_the_option(capsys, change, option):
    argv = list(BASE)
    for key, value in zip(change[::2], change[1::2], strict=True):
        if key in argv:
            argv[argv.index(key) + 1] = value
        else:
            argv += [key, value]
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert option in err
    assert out == ""


def test_unparseable_frequency_is_an_argparse_error(capsys):
    parser = argparse.ArgumentParser(prog="phasefree budget")
    budget.add_arguments(parser)
    with pytest.raises(SystemExit) as exc:
        parser.parse_args([*BASE, "--tx-power-dbm", "10", "--frequency", "ten MHz"])
    assert exc.value.code == 2
    assert "--frequency" in capsys.readouterr().err


def test_command_interface():
    assert isinstance(budget.HELP, str) and "\n" not in budget.HELP
