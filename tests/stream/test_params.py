"""Tests for parameter declarations (stream/params.py): types, bounds, range text, validation.

Expected values are the parameter rules as written in the module (types, inclusive or strict
bounds, NaN always refused); the floating-point cases (NaN, infinities, exact integers held in
a float) follow IEEE 754 as Python's ``float`` implements it.
"""

from __future__ import annotations

import math

import pytest

from stream.errors import ParamError
from stream.params import REQUIRED, Param, validate_params


def _refuses(param: Param, value: object, message: str) -> ParamError:
    with pytest.raises(ParamError) as info:
        param.check(value)
    err = info.value
    assert err.name == param.name
    assert err.message == message, err.message
    assert str(err) == f"{param.name}: {message}"
    return err


# -- types ------------------------------------------------------------------------------------

def test_float_accepts_numbers_and_returns_float():
    p = Param("gain_db", float, 0.0)
    assert p.check(3) == 3.0 and type(p.check(3)) is float
    assert p.check(-2.5) == -2.5


@pytest.mark.parametrize(("value", "shown"), [("3", "'3'"), (True, "True"), (None, "None"),
                                              ([1.0], "[1.0]")])
def test_float_refuses_non_numbers(value, shown):
    _refuses(Param("gain_db", float, 0.0), value, f"must be a number (got {shown})")


@pytest.mark.parametrize(("value", "shown"), [(math.nan, "nan"), (math.inf, "inf"),
                                              (-math.inf, "-inf")])
def test_float_refuses_nan_and_infinities(value, shown):
    _refuses(Param("x", float, 0.0), value, f"must be a finite number (got {shown})")


def test_float_may_allow_infinity_but_never_nan():
    p = Param("timeout_s", float, math.inf, finite=False, low=0)
    assert p.check(math.inf) == math.inf
    _refuses(p, math.nan, "must be a finite number (got nan)")


def test_float_refuses_an_integer_too_large_for_a_float():
    _refuses(Param("x", float, 0.0), 10**400,
             "must be a finite number (got an integer too large for a float)")


def test_int_accepts_integers_and_whole_floats():
    p = Param("taps", int, 1)
    assert p.check(7) == 7
    assert p.check(4.0) == 4 and type(p.check(4.0)) is int
    assert p.check(1e15) == 10**15


@pytest.mark.parametrize(("value", "message"), [
    (4.5, "must be an integer (got 4.5)"),
    (math.nan, "must be an integer (got nan)"),
    (math.inf, "must be an integer (got inf)"),
    (True, "must be an integer (got True)"),
    ("4", "must be an integer (got '4')"),
])
def test_int_refuses_non_integers(value, message):
    _refuses(Param("taps", int, 1), value, message)


def test_bool_accepts_only_booleans():
    p = Param("realtime", bool, False)
    assert p.check(True) is True and p.check(False) is False
    _refuses(p, 1, "must be true or false (got 1)")
    _refuses(p, "true", "must be true or false (got 'true')")


def test_str_and_choices():
    p = Param("modulation", str, "ook", choices=("ook", "2fsk"))
    assert p.check("2fsk") == "2fsk"
    _refuses(p, 5, "must be a string (got 5)")
    _refuses(p, "dpsk", "must be one of 'ook', '2fsk' (got 'dpsk')")


def test_numeric_choices():
    p = Param("bits", int, 8, choices=(8, 16))
    assert p.check(16.0) == 16
    _refuses(p, 12, "must be one of 8, 16 (got 12)")


def test_list_and_its_items():
    assert Param("names", list, [], items=str).check(["a", "b"]) == ["a", "b"]
    floats = Param("taps", list, [], items=float)
    assert floats.check([1, 2.5]) == [1, 2.5]
    _refuses(floats, (1, 2), "must be a list (got (1, 2))")
    _refuses(floats, [1, True], "item 1 must be a number (got [1, True])")
    _refuses(floats, [1, "2"], "item 1 must be a number (got [1, '2'])")
    ints = Param("lags", list, [], items=int)
    _refuses(ints, [1, 2.0], "item 1 must be an integer (got [1, 2.0])")
    assert Param("any", list, []).check([1, "x", None]) == [1, "x", None]


def test_none_means_automatic_only_when_the_default_is_none():
    assert Param("sample_rate", float, None, low=0, low_open=True).check(None) is None
    _refuses(Param("gain_db", float, 0.0), None, "must be a number (got None)")


# -- bounds -----------------------------------------------------------------------------------

@pytest.mark.parametrize(("param", "ok", "bad", "message"), [
    (Param("x", float, low=0), [0, 1e9], -1e-9, "must be >= 0 (got -1e-09)"),
    (Param("x", float, low=0, low_open=True), [1e-300, 5], 0, "must be > 0 (got 0)"),
    (Param("x", float, high=1), [1, -1e9], 1.0000001, "must be <= 1 (got 1.0000001)"),
    (Param("x", float, high=1, high_open=True), [0.999999], 1, "must be < 1 (got 1)"),
    (Param("x", float, low=-200, high=200), [-200, 200], 200.5, "must be <= 200 (got 200.5)"),
    (Param("x", float, low=-200, high=200), [0], -201, "must be >= -200 (got -201)"),
    (Param("n", int, low=1, high=1 << 22), [1, 1 << 22], 0, "must be >= 1 (got 0)"),
    (Param("n", int, low=1, high=1 << 22), [2], (1 << 22) + 1, "must be <= 4.1943e+06 "
                                                               "(got 4194305)"),
])
def test_bounds(param, ok, bad, message):
    for value in ok:
        assert param.check(value) == value
    _refuses(param, bad, message)


def test_value_is_shown_as_written():
    # "(got -5)" for an integer written into a float parameter, as in DESIGN.md's example
    _refuses(Param("sample_rate", float, low=0, low_open=True), -5, "must be > 0 (got -5)")


# -- documentation text -----------------------------------------------------------------------

@pytest.mark.parametrize(("param", "text"), [
    (Param("x", float, low=0, low_open=True), "> 0"),
    (Param("x", float, low=0), ">= 0"),
    (Param("x", float, high=1, high_open=True), "< 1"),
    (Param("x", float, low=0, high=1), ">= 0, <= 1"),
    (Param("x", float, low=1e-6, high=1e9), ">= 1e-06, <= 1e+09"),
    (Param("x", str, "ook", choices=("ook", "2fsk", "dbpsk")), "ook | 2fsk | dbpsk"),
    (Param("x", float), "any"),
])
def test_range_text(param, text):
    assert param.range_text() == text


def test_required():
    assert Param("path", str).required
    assert Param("path", str).default is REQUIRED
    assert not Param("gain_db", float, 0.0).required
    assert not Param("sample_rate", float, None).required
    assert repr(REQUIRED) == "REQUIRED"


# -- validate_params --------------------------------------------------------------------------

DECLARED = (
    Param("path", str),
    Param("gain_db", float, 0.0, low=-300, high=300),
    Param("taps", int, 31, low=1),
)


def test_validate_fills_defaults_and_converts():
    p = validate_params(DECLARED, {"path": "out.raw", "gain_db": 6})
    assert (p.path, p.gain_db, p.taps) == ("out.raw", 6.0, 31)
    assert type(p.gain_db) is float


def test_validate_refuses_unknown_keys_listing_the_known_ones():
    with pytest.raises(ParamError) as info:
        validate_params(DECLARED, {"path": "x", "gian_db": 1})
    assert info.value.name == "gian_db"
    assert info.value.message == "unknown parameter (known: gain_db, path, taps)"


def test_validate_refuses_missing_required():
    with pytest.raises(ParamError) as info:
        validate_params(DECLARED, {"gain_db": 1})
    assert (info.value.name, info.value.message) == ("path", "is required")


def test_validate_with_nothing_declared():
    assert vars(validate_params((), {})) == {}
    with pytest.raises(ParamError, match=r"^x: unknown parameter \(known: none\)$"):
        validate_params((), {"x": 1})


def test_validate_reports_the_bad_value_by_name():
    with pytest.raises(ParamError, match=r"^taps: must be >= 1 \(got 0\)$"):
        validate_params(DECLARED, {"path": "x", "taps": 0})


# -- tables (dict) ----------------------------------------------------------------------------

def test_dict_accepts_a_table_and_refuses_other_values():
    # A TOML inline table ({a = 1}) arrives from tomllib as a dict (Python docs, tomllib).
    p = Param("fallback_params", dict, None)
    assert p.check({"modulation": "ook", "ebn0_db": 9}) == {"modulation": "ook", "ebn0_db": 9}
    assert p.check(None) is None
    _refuses(p, [1, 2], "must be a table (got [1, 2])")
    _refuses(p, "modulation=ook", "must be a table (got 'modulation=ook')")
