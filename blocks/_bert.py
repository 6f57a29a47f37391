"""PRBS bit error testing: self-synchronising acquisition, loss of sync, exact counting.

The tester receives hard bits that should carry an ITU-T O.150 pattern [1]_ and knows nothing
about their alignment.

Acquisition (self-synchronisation)
    Each received bit is checked against the pattern's recurrence applied to the received bits
    themselves (``blocks._prbs.prbs_expected``). An error disturbs three such checks, so a run
    of ``acquire_bits`` passing checks means ``acquire_bits + degree`` clean bits; random data
    passes with probability ``2**-acquire_bits``. A run of checks that all *fail* is the
    pattern received with inverted polarity, which is locked onto the same way and reported.
    The local generator is then seeded from the last ``degree`` bits of the run and bits are
    counted from the next one. Runs that would seed the all-zero register (a stuck line) are
    refused.
Counting and loss of sync
    Locked, the received bits are compared with the local generator (no error multiplication).
    Stream framing judges consecutive windows of ``window_bits`` counted from the lock point;
    a window with more than ``loss_threshold`` of its bits in error means sync is lost. A
    window that passes is committed only once the next one passes too, so that on a loss the
    onset can be placed over both windows: the start of the stretch, running to the end of
    the failed window, whose error count most exceeds ``loss_threshold`` times its length
    (a CUSUM change point [3]_). Bits before the onset are counted, the rest is not, and
    acquisition restarts at the onset. A bit slip therefore adds no counted errors and costs
    about ``degree + acquire_bits`` uncounted bits; an error burst short enough to keep
    every window under the threshold is counted as errors (the pattern stayed aligned), a
    longer one is treated as a loss of sync. A partial window at the end of the stream (or
    before a gap) is judged the same way, its failing tail dropped without counting a loss.
    Counts therefore lag the input by up to two windows.
Packet framing
    The input carries the payload bits of packets, each announced by a ``"packet"`` annotation
    at its first bit with its length; the payloads are consecutive segments of one
    continuous pattern. Each packet is compared whole with the continuation of the previous
    one. If it fails (a packet was lost upstream, or this one is ruined, or its length was
    misread) the tester counts it up to the loss onset if that part matched over at least
    ``acquire_bits``, re-acquires inside the rest of the packet and counts the bits after
    the acquisition run, judged the same way. Bits between packets are ignored.
Gaps
    Missing samples (a chunk whose start jumps forward, or a ``"gap"`` annotation) end the
    lock; acquisition restarts after the gap, and the gap is never counted as errors.

Every decision depends on absolute bit positions only, so the counts do not depend on how
the stream is cut into chunks.

The confidence interval of the bit error ratio is the exact binomial (Clopper-Pearson)
interval [2]_.

References
----------
.. [1] ITU-T Recommendation O.150, sec. 5 (pseudo-random test patterns).
.. [2] C. J. Clopper and E. S. Pearson, "The use of confidence or fiducial limits illustrated
   in the case of the binomial", Biometrika 26(4), 1934.
.. [3] E. S. Page, "Continuous inspection schemes", Biometrika 41(1/2), 1954 (CUSUM).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields, replace
from types import SimpleNamespace

import numpy as np
from scipy.special import betaincinv

from blocks._prbs import (
    PrbsPolynomial,
    PrbsState,
    prbs_expected,
    prbs_polynomial,
    prbs_sequence,
    prbs_state_after,
)

__all__ = [
    "FRAMINGS",
    "BertConfig",
    "BertState",
    "bert_finish",
    "bert_update",
    "clopper_pearson",
]

#: How the tested bits are organised: one continuous stream, or packet payloads.
FRAMINGS: tuple[str, ...] = ("stream", "packets")

_EMPTY = np.zeros(0, dtype=np.uint8)
_EMPTY_FLAGS = np.zeros(0, dtype=bool)


def _loss_onset(flags: np.ndarray, threshold: float) -> int:
    """Where sync was lost: the start of the suffix with the largest error excess.

    The excess of a suffix is its errors minus ``threshold`` times its length (Page's CUSUM
    statistic, module reference [3], run backwards from the end). ``flags`` ends with a
    window whose excess is positive, so the best suffix starts at an error inside the dense
    stretch, and a lone error well before it is left to the in-sync part.
    """
    score = np.cumsum((flags - threshold)[::-1])[::-1]
    return int(np.argmax(score))


@dataclass(frozen=True)
class BertConfig:
    """Settings of a bit error tester.

    Parameters
    ----------
    pattern : str
        PRBS name (``blocks._prbs.PRBS_NAMES``).
    acquire_bits : int
        Consecutive passing recurrence checks needed to lock, >= 8.
    window_bits : int
        Length of the windows judged for loss of sync (stream framing), >= 16.
    loss_threshold : float
        Error fraction above which a window (or packet) is out of sync, 0 < x < 0.5.
    framing : str
        ``"stream"`` or ``"packets"``.
    """

    pattern: str = "prbs15"
    acquire_bits: int = 64
    window_bits: int = 512
    loss_threshold: float = 0.2
    framing: str = "stream"

    def __post_init__(self) -> None:
        prbs_polynomial(self.pattern)
        if self.acquire_bits < 8:
            raise ValueError(f"acquire_bits must be >= 8 (got {self.acquire_bits!r})")
        if self.window_bits < 16:
            raise ValueError(f"window_bits must be >= 16 (got {self.window_bits!r})")
        if not 0.0 < self.loss_threshold < 0.5:
            raise ValueError(f"loss_threshold must be in (0, 0.5) (got {self.loss_threshold!r})")
        if self.framing not in FRAMINGS:
            raise ValueError(f"framing must be one of {', '.join(FRAMINGS)} "
                             f"(got {self.framing!r})")


@dataclass(frozen=True)
class BertState:
    """Everything a tester carries from one chunk to the next.

    Counters: ``bits`` and ``errors`` (counted in sync), ``sync_losses``, ``gaps``,
    ``packets`` and ``errored_packets`` (packet framing). The rest is working state:
    ``position`` (index of the next input bit), ``locked``, ``inverted`` (polarity of the
    current or last lock), ``generator`` (local PRBS at the start of ``pending``),
    ``history`` (the bits just before the next hunted or pending bit), ``run`` /
    ``run_value`` (the current run of recurrence checks), ``pending`` (bits of the window or
    packet not yet judged) and ``packet_left`` (payload bits still to come).
    """

    position: int = 0
    locked: bool = False
    inverted: bool = False
    generator: PrbsState | None = None
    history: bytes = b""
    run: int = 0
    run_value: int = 0
    pending: bytes = b""
    held: bytes = b""
    held_flags: bytes = b""
    packet_left: int = 0
    bits: int = 0
    errors: int = 0
    sync_losses: int = 0
    gaps: int = 0
    packets: int = 0
    errored_packets: int = 0


_BYTE_FIELDS = ("history", "pending", "held")


class _Tester:
    """Mutable working copy of a BertState while one chunk is processed."""

    def __init__(self, config: BertConfig, state: BertState) -> None:
        self.cfg = config
        self.poly: PrbsPolynomial = prbs_polynomial(config.pattern)
        self.s = SimpleNamespace(**{f.name: getattr(state, f.name) for f in fields(state)})
        for name in _BYTE_FIELDS:
            setattr(self.s, name, np.frombuffer(getattr(state, name), dtype=np.uint8))
        self.s.held_flags = np.frombuffer(state.held_flags, dtype=bool)

    def frozen(self, template: BertState) -> BertState:
        values = vars(self.s).copy()
        for name in _BYTE_FIELDS:
            values[name] = np.ascontiguousarray(values[name], dtype=np.uint8).tobytes()
        values["held_flags"] = np.ascontiguousarray(values["held_flags"], dtype=bool).tobytes()
        return replace(template, **values)

    # -- acquisition ------------------------------------------------------------------------
    def hunt(self, x: np.ndarray) -> int | None:
        """Scan ``x`` for an acquisition run; lock and return the index of its last bit."""
        s, p = self.s, self.poly.degree
        full = np.concatenate((s.history, x))
        h, n = len(s.history), len(x)
        values = np.full(n, -1, dtype=np.int8)
        first = max(p - h, 0)
        if first < n:
            mismatch = full[p:] ^ prbs_expected(self.cfg.pattern, full)  # index i - p
            v = mismatch[h + first - p:].astype(np.int8)
            ends = np.arange(h + first, h + n)  # full index of each checked bit
            csum = np.concatenate(([0], np.cumsum(full, dtype=np.int64)))
            ones = csum[ends + 1] - csum[ends + 1 - p]
            level = v ^ np.int8(self.poly.inverted)  # received value of an all-zero register
            stuck = np.where(level == 1, ones == p, ones == 0)
            values[first:] = np.where(stuck, np.int8(-1), v)
        length = self._run_lengths(values)
        hits = np.flatnonzero(length >= self.cfg.acquire_bits)
        if hits.size == 0:
            s.history = full[-p:].copy()
            s.run = int(length[-1]) if n else s.run
            s.run_value = int(values[-1]) if n else s.run_value
            return None
        j = int(hits[0])
        polarity = int(values[j])
        seed = full[h + j + 1 - p:h + j + 1]
        s.generator = prbs_state_after(self.cfg.pattern, seed ^ np.uint8(polarity))
        s.locked, s.inverted = True, bool(polarity)
        s.history, s.pending = seed.copy(), _EMPTY
        s.run, s.run_value = 0, 0
        return j

    def _run_lengths(self, values: np.ndarray) -> np.ndarray:
        """Length of the run of equal valid check values ending at each position."""
        n = len(values)
        if n == 0:
            return np.zeros(0, dtype=np.int64)
        idx = np.arange(n)
        starts = np.ones(n, dtype=bool)
        starts[1:] = values[1:] != values[:-1]
        run_start = np.maximum.accumulate(np.where(starts, idx, 0))
        length = idx - run_start + 1
        if values[0] >= 0 and values[0] == self.s.run_value and self.s.run > 0:
            length[run_start == 0] += self.s.run
        length[values < 0] = 0
        return length

    def unlock(self, history: np.ndarray) -> None:
        s = self.s
        s.locked, s.generator, s.pending = False, None, _EMPTY
        s.held, s.held_flags = _EMPTY, _EMPTY_FLAGS
        s.history = history[-self.poly.degree:].copy()
        s.run, s.run_value = 0, 0

    # -- counting ---------------------------------------------------------------------------
    def compare(self, x: np.ndarray) -> tuple[np.ndarray, PrbsState]:
        """Error flags of ``x`` against the local generator, and the generator after ``x``."""
        expected, after = prbs_sequence(self.cfg.pattern, len(x), self.s.generator)
        if self.s.inverted:
            expected ^= 1
        return x != expected, after

    def _commit(self, flags: np.ndarray) -> None:
        self.s.bits += len(flags)
        self.s.errors += int(np.count_nonzero(flags))

    def judge_windows(self, data: np.ndarray, final: bool) -> np.ndarray:
        """Judge the complete windows of ``data`` (the pending bits, then new ones).

        A window that passes is held back until the next one passes too, so that when sync
        is lost the onset can be searched over both (a slip late in a window would otherwise
        have its errors counted). Returns the bits to hunt through after a loss of sync (else
        empty). An incomplete last window stays pending; with ``final`` it is judged too, and
        if it fails the bits from the onset on are dropped without counting a loss.
        """
        s, w, p = self.s, self.cfg.window_bits, self.poly.degree
        judged = len(data) if final else len(data) // w * w
        errs, after = self.compare(data[:judged])
        edges = np.arange(0, judged, w)
        sizes = np.diff(np.append(edges, judged))
        counts = np.add.reduceat(errs, edges, dtype=np.int64) if judged else sizes
        bad = np.flatnonzero(counts > self.cfg.loss_threshold * sizes)
        windows = len(edges)
        k = int(bad[0]) if bad.size else windows  # first failing window (none: windows)
        # passing windows 0..k-1: commit the held window and 0..k-2, hold k-1 for now
        if final and not bad.size:
            hold_from: int | None = judged  # end of stream: nothing left to wait for
        else:
            hold_from = int(edges[k - 1]) if k >= 1 else None
        if hold_from is not None:
            hold_to = int(edges[k]) if k < windows else judged
            self._commit(s.held_flags)
            self._commit(errs[:hold_from])
            s.history = np.concatenate((s.history, s.held, data[:hold_from]))[-p:]
            s.held, s.held_flags = data[hold_from:hold_to], errs[hold_from:hold_to]
        if not bad.size:
            s.generator, s.pending = after, data[judged:]
            return _EMPTY
        begin, end = int(edges[k]), int(edges[k] + sizes[k])
        span = np.concatenate((s.held, data[begin:end]))
        flags = np.concatenate((s.held_flags, errs[begin:end]))
        onset = _loss_onset(flags, self.cfg.loss_threshold)
        self._commit(flags[:onset])
        self.unlock(np.concatenate((s.history, span[:onset])))
        if final and end == len(data) and sizes[k] < w:
            return _EMPTY  # a bad tail at the end of the stream: dropped, not a loss of sync
        s.sync_losses += 1
        return np.concatenate((span[onset:], data[end:]))

    def feed_stream(self, x: np.ndarray) -> None:
        s = self.s
        while len(x):
            if not s.locked:
                j = self.hunt(x)
                if j is None:
                    return
                x = x[j + 1:]
                continue
            x = self.judge_windows(np.concatenate((s.pending, x)), final=False)

    def close_window(self) -> None:
        """Judge a partial window at the end of the stream or before a gap."""
        while self.s.locked:
            rest = self.judge_windows(self.s.pending, final=True)
            if not len(rest):
                return
            self.feed_stream(rest)

    # -- packets ----------------------------------------------------------------------------
    def feed_packets(self, x: np.ndarray) -> None:
        s = self.s
        take = min(s.packet_left, len(x))
        if take:
            s.pending = np.concatenate((s.pending, x[:take]))
            s.packet_left -= take
            if s.packet_left == 0:
                self.close_packet()

    def close_packet(self) -> None:
        """Judge one packet's payload (complete, or cut short by a gap or the next packet).

        A packet that fails is counted up to its loss onset when that part is trustworthy
        (it follows a lock made inside this packet, or it matched the continuation over at
        least ``acquire_bits``); the tester then re-acquires within the rest of the packet.
        """
        s, cfg = self.s, self.cfg
        data, s.pending, s.packet_left = s.pending, _EMPTY, 0
        if not s.locked:
            self.unlock(_EMPTY)  # no continuity across packets is assumed when hunting
        fresh, bits, errors = False, 0, 0
        while len(data):
            if not s.locked:
                j = self.hunt(data)
                if j is None:
                    break
                data, fresh = data[j + 1:], True
                continue
            errs, after = self.compare(data)
            count = int(np.count_nonzero(errs))
            if count <= cfg.loss_threshold * len(data):
                bits, errors, s.generator = bits + len(data), errors + count, after
                break
            onset = _loss_onset(errs, cfg.loss_threshold)
            keep = onset if fresh or onset >= cfg.acquire_bits else 0
            bits, errors = bits + keep, errors + int(np.count_nonzero(errs[:keep]))
            s.sync_losses += 1
            self.unlock(data[:keep])
            data, fresh = data[keep:], False
        s.bits += bits
        s.errors += errors
        if bits:
            s.packets += 1
            s.errored_packets += int(errors > 0)

    # -- stream structure -------------------------------------------------------------------
    def feed(self, x: np.ndarray) -> None:
        if self.cfg.framing == "packets":
            self.feed_packets(x)
        else:
            self.feed_stream(x)

    def flush(self) -> None:
        if self.cfg.framing == "packets":
            self.close_packet()
        else:
            self.close_window()

    def gap(self) -> None:
        self.flush()
        self.s.gaps += 1
        self.unlock(_EMPTY)

    def packet(self, payload_bits: int) -> None:
        self.close_packet()
        self.s.packet_left = payload_bits


def bert_update(bits: np.ndarray, start: int, config: BertConfig,
                state: BertState | None = None, *,
                packets: Sequence[tuple[int, int]] = (), gaps: Sequence[int] = ()) -> BertState:
    """Feed received bits to the tester.

    Parameters
    ----------
    bits : numpy.ndarray
        Hard bits, 1-D uint8 of 0/1.
    start : int
        Absolute index of ``bits[0]`` on the bit stream. A start other than the previous
        chunk's end is a gap (samples missing).
    config : BertConfig
        Tester settings.
    state : BertState or None
        From the previous call; None at the start of the stream.
    packets : sequence of (int, int)
        Packet framing: ``(index, payload_bits)`` of each packet that starts in this chunk
        (absolute index of its first payload bit).
    gaps : sequence of int
        Absolute indices in this chunk before which samples are missing.

    Returns
    -------
    BertState
        Counters and working state after these bits.

    Raises
    ------
    ValueError
        For bits that are not 0/1 uint8, an event outside the chunk, or a negative
        packet length.

    Notes
    -----
    Algorithm in the module notes: self-synchronising acquisition on the O.150 recurrence
    [1]_, window or packet judgement for loss of sync, exact comparison while locked.

    References
    ----------
    .. [1] ITU-T Recommendation O.150, sec. 5.
    """
    arr = np.asarray(bits)
    if arr.ndim != 1 or arr.dtype != np.uint8:
        raise ValueError(f"bits must be a 1-D uint8 array (got {arr.ndim}-D {arr.dtype})")
    if arr.size and int(arr.max()) > 1:
        raise ValueError(f"bits must be 0 or 1 (got a value {int(arr.max())})")
    if state is None:
        state = BertState(position=start)
    stop = start + len(arr)
    events: list[tuple[int, int, int]] = []  # (index, order, payload bits); gaps sort first
    for index in gaps:
        events.append((int(index), 0, 0))
    for index, length in packets:
        if int(length) < 0:
            raise ValueError(f"packet at index {index}: payload_bits must be >= 0 "
                             f"(got {length!r})")
        events.append((int(index), 1, int(length)))
    for index, _, _ in events:
        if not start <= index <= stop:
            raise ValueError(f"event index {index} is outside the chunk [{start}, {stop})")
    events.sort()
    tester = _Tester(config, state)
    if start != state.position:
        tester.gap()  # samples missing (or a stream restarted): never counted as errors
    done = start
    for index, order, length in events:
        tester.feed(arr[done - start:index - start])
        done = index
        if order == 0:
            tester.gap()
        else:
            tester.packet(length)
    tester.feed(arr[done - start:])
    tester.s.position = stop
    return tester.frozen(state)


def bert_finish(config: BertConfig, state: BertState | None) -> BertState:
    """End of stream: judge the partial window or packet still pending."""
    if state is None:
        return BertState()
    tester = _Tester(config, state)
    tester.flush()
    return tester.frozen(state)


def clopper_pearson(errors: int, bits: int, confidence: float = 0.95) -> tuple[float, float]:
    """Exact (Clopper-Pearson) confidence interval of a bit error ratio.

    Parameters
    ----------
    errors : int
        Errors counted, ``0 <= errors <= bits``.
    bits : int
        Bits compared.
    confidence : float
        Two-sided confidence level, 0 < c < 1.

    Returns
    -------
    (low, high) : tuple of float
        ``low = B(alpha/2; k, n-k+1)``, ``high = B(1-alpha/2; k+1, n-k)`` with ``B`` the beta
        quantile, ``alpha = 1 - confidence``; 0 and 1 at the ends [1]_. With no bits the
        interval is (0, 1). The quantile is the inverse of the regularised incomplete beta
        function, ``scipy.special.betaincinv``: the values of ``scipy.stats.beta.ppf``
        without the cost of its argument handling.

    References
    ----------
    .. [1] C. J. Clopper and E. S. Pearson, Biometrika 26(4), 1934.
    """
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1) (got {confidence!r})")
    if not 0 <= errors <= bits:
        raise ValueError(f"errors must be in [0, bits] (got {errors} of {bits})")
    alpha = 1.0 - confidence
    low = 0.0 if errors == 0 else float(betaincinv(errors, bits - errors + 1, alpha / 2))
    high = 1.0 if errors == bits else float(betaincinv(errors + 1, bits - errors, 1 - alpha / 2))
    return low, high
