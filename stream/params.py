"""Block parameters: declaration, validation and the text that documents them.

Each block declares its parameters once (type, unit, range, default, one-line doc). The same
declaration validates a pipeline file, a ``--set`` override and a direct constructor call, and
generates the ``phasefree blocks KIND`` listing, so documentation cannot drift from the code.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any

from stream.errors import ParamError

__all__ = ["REQUIRED", "Param", "validate_params"]


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of a parameter that must be given.
REQUIRED: Any = _Required()

_TYPE_WORDS = {float: "a number", int: "an integer", str: "a string", bool: "true or false",
               list: "a list", dict: "a table"}


@dataclass(frozen=True)
class Param:
    """Declaration of one block parameter.

    Parameters
    ----------
    name : str
        Key in the pipeline file.
    type : type
        One of ``float``, ``int``, ``str``, ``bool``, ``list``, ``dict`` (a TOML table).
    default : object
        Value when not given; ``REQUIRED`` if it must be given; ``None`` for "automatic"
        (the block decides, or the pipeline supplies it, e.g. ``sample_rate``).
    unit : str
        Unit shown in listings (``"Hz"``, ``"dB"``, ``"samples"``).
    doc : str
        One line saying what the parameter does.
    low, high : float or None
        Inclusive bounds, unless ``low_open`` / ``high_open`` make them strict.
    choices : tuple or None
        Allowed values for strings (or numbers).
    finite : bool
        Reject infinities (NaN is always rejected).
    items : type or None
        Element type for ``list`` parameters.
    """

    name: str
    type: type
    default: Any = REQUIRED
    unit: str = ""
    doc: str = ""
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple[Any, ...] | None = None
    finite: bool = True
    items: type | None = None

    @property
    def required(self) -> bool:
        """Whether the parameter must be given."""
        return self.default is REQUIRED

    def range_text(self) -> str:
        """Human-readable allowed range, e.g. ``"> 0"``, ``"0 .. 1"``, ``"ook | 2fsk"``."""
        if self.choices is not None:
            return " | ".join(str(c) for c in self.choices)
        lo = None if self.low is None else f"{'>' if self.low_open else '>='} {self.low:g}"
        hi = None if self.high is None else f"{'<' if self.high_open else '<='} {self.high:g}"
        return ", ".join(x for x in (lo, hi) if x) or "any"

    def check(self, value: Any) -> Any:
        """Return ``value`` converted to the declared type, or raise ParamError."""
        if value is None and self.default is None:
            return None
        kind = self.type
        got = f"(got {value!r})"
        if kind is bool:
            if not isinstance(value, bool):
                raise ParamError(self.name, f"must be true or false {got}")
            return value
        if kind in (int, float):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ParamError(self.name, f"must be {_TYPE_WORDS[kind]} {got}")
            if kind is int:
                if isinstance(value, float):
                    if not value.is_integer():
                        raise ParamError(self.name, f"must be an integer {got}")
                    value = int(value)
            else:
                try:
                    value = float(value)
                except OverflowError:  # an integer too large for a float (TOML allows it)
                    raise ParamError(self.name, "must be a finite number (got an integer "
                                     "too large for a float)") from None
                if math.isnan(value) or (self.finite and math.isinf(value)):
                    raise ParamError(self.name, f"must be a finite number {got}")
            self._check_range(value, got)
        elif kind is str:
            if not isinstance(value, str):
                raise ParamError(self.name, f"must be a string {got}")
        elif kind is list:
            if not isinstance(value, list):
                raise ParamError(self.name, f"must be a list {got}")
            if self.items is not None:
                for i, item in enumerate(value):
                    ok = isinstance(item, self.items) and not isinstance(item, bool)
                    if self.items is float:
                        ok = isinstance(item, (int, float)) and not isinstance(item, bool)
                    if not ok:
                        raise ParamError(
                            self.name, f"item {i} must be {_TYPE_WORDS[self.items]} {got}")
        elif kind is dict and not isinstance(value, dict):
            raise ParamError(self.name, f"must be a table {got}")
        if self.choices is not None and value not in self.choices:
            allowed = ", ".join(repr(c) for c in self.choices)
            raise ParamError(self.name, f"must be one of {allowed} {got}")
        return value

    def _check_range(self, value: float, got: str) -> None:
        if self.low is not None:
            if self.low_open and not value > self.low:
                raise ParamError(self.name, f"must be > {self.low:g} {got}")
            if not self.low_open and not value >= self.low:
                raise ParamError(self.name, f"must be >= {self.low:g} {got}")
        if self.high is not None:
            if self.high_open and not value < self.high:
                raise ParamError(self.name, f"must be < {self.high:g} {got}")
            if not self.high_open and not value <= self.high:
                raise ParamError(self.name, f"must be <= {self.high:g} {got}")


def validate_params(declared: tuple[Param, ...], given: Mapping[str, Any]) -> SimpleNamespace:
    """Validate ``given`` against ``declared`` and fill in defaults.

    Parameters
    ----------
    declared : tuple of Param
        A block's parameter declarations.
    given : mapping
        Values from a pipeline file, the command line or a constructor call.

    Returns
    -------
    types.SimpleNamespace
        One attribute per declared parameter.

    Raises
    ------
    ParamError
        For an unknown key, a missing required value, or a value of the wrong type or range.
    """
    by_name = {p.name: p for p in declared}
    for key in given:
        if key not in by_name:
            known = ", ".join(sorted(by_name)) or "none"
            raise ParamError(key, f"unknown parameter (known: {known})")
    values: dict[str, Any] = {}
    for p in declared:
        if p.name in given:
            values[p.name] = p.check(given[p.name])
        elif p.required:
            raise ParamError(p.name, "is required")
        else:
            values[p.name] = p.default
    return SimpleNamespace(**values)
