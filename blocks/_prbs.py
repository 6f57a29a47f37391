"""Pseudo-random binary test sequences (ITU-T O.150) and their self-synchronising check.

Each sequence is the output of a maximal-length linear feedback shift register of ``degree``
stages whose feedback polynomial is ``x^degree + x^tap + 1`` [1]_. The bit sequence ``a``
satisfies the recurrence ``a[n] = a[n - degree] XOR a[n - tap]``; the standard start is the
register full of ones, and the register contents come out first, so every sequence begins
with ``degree`` ones (before inversion). O.150 transmits the 2^15-1 and 2^23-1 sequences
inverted; they are given here as transmitted, i.e. inverted.

Generation is vectorised with the squared recurrence: over GF(2),
``(1 + D^tap + D^degree)^(2^k) = 1 + D^(2^k tap) + D^(2^k degree)`` for the delay operator
``D``, so ``a[n] = a[n - 2^k degree] XOR a[n - 2^k tap]`` holds too, and once ``2^k degree``
bits are known the next ``2^k tap`` bits follow in one numpy operation. The block length
doubles as the history grows, so ``count`` bits take ``O(log count)`` array operations.
Patterns of up to ``TABLE_DEGREE`` stages are generated that way only once, two periods
long, with the position of every register state in the period; every call copies from
that table.

References
----------
.. [1] ITU-T Recommendation O.150, "General requirements for instrumentation for performance
   measurements on digital transmission equipment", sec. 5 (pseudo-random test patterns:
   2^9-1 with feedback from stages 5 and 9; 2^15-1 from stages 14 and 15, inverted;
   2^23-1 from stages 18 and 23, inverted).
.. [2] S. W. Golomb, Shift Register Sequences, Holden-Day, 1967, ch. III (period 2^n - 1,
   balance and run properties of maximal-length sequences).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache

import numpy as np

__all__ = [
    "PRBS_NAMES",
    "PRBS_POLYNOMIALS",
    "TABLE_DEGREE",
    "PrbsPolynomial",
    "PrbsState",
    "prbs_expected",
    "prbs_polynomial",
    "prbs_sequence",
    "prbs_state_after",
]


@dataclass(frozen=True)
class PrbsPolynomial:
    """A PRBS generator: feedback polynomial ``x^degree + x^tap + 1`` and output polarity.

    Parameters
    ----------
    name : str
        Pattern name, e.g. ``"prbs15"``.
    degree : int
        Number of register stages (the sequence period is ``2**degree - 1``).
    tap : int
        The middle exponent of the polynomial (the second feedback stage).
    inverted : bool
        Whether the sequence is transmitted inverted (ITU-T O.150 for 2^15-1 and 2^23-1).
    """

    name: str
    degree: int
    tap: int
    inverted: bool

    @property
    def period(self) -> int:
        """Length of one period in bits, ``2**degree - 1``."""
        return (1 << self.degree) - 1


#: The supported patterns. prbs9/15/23 follow ITU-T O.150 sec. 5; prbs7 (x^7 + x^6 + 1,
#: not inverted) is common practice for short test patterns.
PRBS_POLYNOMIALS: dict[str, PrbsPolynomial] = {
    "prbs7": PrbsPolynomial("prbs7", 7, 6, False),
    "prbs9": PrbsPolynomial("prbs9", 9, 5, False),
    "prbs15": PrbsPolynomial("prbs15", 15, 14, True),
    "prbs23": PrbsPolynomial("prbs23", 23, 18, True),
}
#: Pattern names accepted everywhere a PRBS is chosen.
PRBS_NAMES: tuple[str, ...] = tuple(PRBS_POLYNOMIALS)
#: Most register stages of a pattern kept as a table (prbs15: some 260 kB of tables).
TABLE_DEGREE = 16


@dataclass(frozen=True)
class PrbsState:
    """Where a PRBS generator stands: its shift register.

    Parameters
    ----------
    name : str
        Pattern name.
    register : bytes
        The next ``degree`` bits of the uninverted sequence, in output order (each byte 0 or
        1); never all zero.
    """

    name: str
    register: bytes


def prbs_polynomial(name: str) -> PrbsPolynomial:
    """Look up a pattern by name.

    Raises
    ------
    ValueError
        If ``name`` is not one of ``PRBS_NAMES``.
    """
    try:
        return PRBS_POLYNOMIALS[name]
    except (KeyError, TypeError):
        raise ValueError(f"pattern must be one of {', '.join(PRBS_NAMES)} (got {name!r})") from None


def _lfsr_extend(head: np.ndarray, count: int, degree: int, tap: int) -> np.ndarray:
    """Continue ``a[n] = a[n-degree] ^ a[n-tap]`` by ``count`` bits after ``head``.

    ``head`` holds ``degree`` consecutive bits of the sequence. Returns ``degree + count`` bits,
    ``head`` first. Uses the squared recurrence described in the module notes.
    """
    total = degree + count
    buf = np.empty(total, dtype=np.uint8)
    buf[:degree] = head
    filled = degree
    span = 1
    while filled < total:
        while 2 * span * degree <= filled:
            span *= 2
        n = min(span * tap, total - filled)
        far = filled - span * degree
        near = filled - span * tap
        np.bitwise_xor(buf[far:far + n], buf[near:near + n], out=buf[filled:filled + n])
        filled += n
    return buf


@cache
def _period_table(name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Tables of a pattern of up to ``TABLE_DEGREE`` stages.

    Returns two periods and one register of the uninverted sequence from the all-ones start;
    the same, as transmitted; the start position in the period of every register state
    (-1: none), the state read as a binary number with its first output bit most
    significant; and the weights that read it so.
    """
    poly = PRBS_POLYNOMIALS[name]
    p, period = poly.degree, poly.period
    plain = _lfsr_extend(np.ones(p, dtype=np.uint8), 2 * period, p, poly.tap)
    sent = plain ^ np.uint8(poly.inverted)
    weights = 1 << np.arange(p - 1, -1, -1)
    states = np.convolve(plain[:period + p - 1], weights[::-1], mode="valid")
    position = np.full(1 << p, -1, dtype=np.int32)
    position[states] = np.arange(period)
    for table in (plain, sent, position, weights):
        table.setflags(write=False)
    return plain, sent, position, weights


def prbs_sequence(name: str, count: int, state: PrbsState | None = None,
                  ) -> tuple[np.ndarray, PrbsState]:
    """Generate the next ``count`` bits of a PRBS, as transmitted.

    Parameters
    ----------
    name : str
        ``"prbs7"``, ``"prbs9"``, ``"prbs15"`` or ``"prbs23"``.
    count : int
        Number of bits, >= 0.
    state : PrbsState or None
        Where to continue; None starts the sequence from the register of all ones.

    Returns
    -------
    bits : numpy.ndarray
        uint8 array of 0/1, O.150 inversion applied where the pattern calls for it.
    state : PrbsState
        State after these bits: passing it back continues the sequence exactly.

    Raises
    ------
    ValueError
        For an unknown name, a negative count, or a state of another pattern.

    Notes
    -----
    Recurrence ``a[n] = a[n - degree] XOR a[n - tap]`` for ``x^degree + x^tap + 1`` [1]_,
    computed in doubling blocks (module notes). Output ``a`` or ``1 - a`` (inverted patterns).

    References
    ----------
    .. [1] ITU-T Recommendation O.150, sec. 5.

    Examples
    --------
    >>> bits, st = prbs_sequence("prbs9", 16)
    >>> "".join(map(str, bits))
    '1111111110000011'
    """
    poly = prbs_polynomial(name)
    if isinstance(count, bool) or int(count) != count or count < 0:
        raise ValueError(f"count must be an integer >= 0 (got {count!r})")
    count = int(count)
    if state is None:
        register = np.ones(poly.degree, dtype=np.uint8)
    else:
        if state.name != name:
            raise ValueError(f"state belongs to {state.name!r}, not {name!r}")
        register = np.frombuffer(state.register, dtype=np.uint8)
    if poly.degree <= TABLE_DEGREE:
        plain, sent, position, weights = _period_table(name)
        at = int(position[int(np.dot(register, weights))])
        if at >= 0:                           # else the all-zero register, which stays zero
            if at + count <= sent.shape[0]:
                bits = sent[at:at + count].copy()
            else:
                bits = np.take(sent[:poly.period], np.arange(at, at + count), mode="wrap")
            end = (at + count) % poly.period
            return bits, PrbsState(name, plain[end:end + poly.degree].tobytes())
    buf = _lfsr_extend(register, count, poly.degree, poly.tap)
    after = PrbsState(name, buf[count:].tobytes())
    bits = buf[:count].copy()
    if poly.inverted:
        bits ^= 1
    return bits, after


def prbs_state_after(name: str, bits: np.ndarray) -> PrbsState:
    """The generator state that continues the sequence after the transmitted ``bits``.

    This seeds a local generator from received data (self-synchronisation): the last
    ``degree`` bits, with the O.150 inversion undone, determine every later bit.

    Parameters
    ----------
    name : str
        Pattern name.
    bits : numpy.ndarray
        At least ``degree`` transmitted-polarity bits (uint8 0/1) ending where the
        continuation should start.

    Returns
    -------
    PrbsState

    Raises
    ------
    ValueError
        If fewer than ``degree`` bits are given, or they would leave the register all zero
        (the lock-up state no PRBS passes through, e.g. a stuck line).
    """
    poly = prbs_polynomial(name)
    arr = np.asarray(bits, dtype=np.uint8)
    if arr.ndim != 1 or arr.shape[0] < poly.degree:
        raise ValueError(f"bits must hold at least {poly.degree} bits for {name} "
                         f"(got {arr.shape[0] if arr.ndim == 1 else arr.shape})")
    last = arr[-poly.degree:] ^ np.uint8(poly.inverted)
    if not last.any():
        raise ValueError(f"the last {poly.degree} bits leave the {name} register all zero, "
                         "a state the sequence never reaches")
    upcoming = _lfsr_extend(last, poly.degree, poly.degree, poly.tap)[poly.degree:]
    return PrbsState(name, upcoming.tobytes())


def prbs_expected(name: str, bits: np.ndarray) -> np.ndarray:
    """Bits the pattern's recurrence predicts from received bits (self-synchronising check).

    Parameters
    ----------
    name : str
        Pattern name.
    bits : numpy.ndarray
        Received bits in transmitted polarity (uint8 0/1), length ``n``.

    Returns
    -------
    numpy.ndarray
        ``max(n - degree, 0)`` bits: element ``k`` is the value the recurrence expects for
        ``bits[degree + k]`` given the bits ``degree`` and ``tap`` places before it.

    Notes
    -----
    For transmitted bits ``t = a XOR c`` (``c = 1`` for inverted patterns) the recurrence
    ``a[n] = a[n-degree] XOR a[n-tap]`` becomes ``t[n] = t[n-degree] XOR t[n-tap] XOR c``.
    One received error disturbs three predictions (at its own place and ``tap``, ``degree``
    places later), so an error-free run of predictions means an error-free stretch of data.
    A stream received with flipped polarity mismatches every prediction.
    """
    poly = prbs_polynomial(name)
    arr = np.asarray(bits, dtype=np.uint8)
    p, q = poly.degree, poly.tap
    if arr.shape[0] <= p:
        return np.zeros(0, dtype=np.uint8)
    out = arr[:-p] ^ arr[p - q:-q]
    if poly.inverted:
        out ^= 1
    return out
