"""Sample continuity of a radio stream: what a driver's read results say was lost.

A radio driver hands samples over in reads. Each read returns a sample count or an error code,
flags, and on some hardware the time of its first sample. ``account_read`` turns one read into
an account of the stream: how many samples are missing before it, and how many of its own
samples repeat samples already delivered. It measures losses three ways, best first:

1. **Hardware time stamps.** The expected time of the next sample is known from the last
   time stamp and the samples since; a read that starts later lost the difference, one that
   starts earlier repeats samples (exact to a sample).
2. **Content.** Without time stamps, a buffer whose contents equal the previous buffer's is a
   stale buffer handed over again: its samples stand in for as many real ones, which are lost.
3. **Wall clock.** Without time stamps, the samples accounted for are compared with the wall
   clock times the sample rate. The lag between them moves with the driver's queue, so a
   loss is counted only when the lag grows beyond a tolerance (the queue's capacity), or at
   the first read after the driver reported an overflow, when it has just emptied its queue.

The wall-clock reference follows the smallest lag seen (the moments the reader has caught up
with the driver), allowed to creep up by ``drift_ppm`` so that a sample clock slower than
nominal is not taken for losses.

State is carried the ``scipy.signal.lfilter`` way: ``verdict, state = account_read(...,
state)``; ``state=None`` starts the account (at the first read after start or after a reopen).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "CORRUPTION",
    "DRIFT_PPM",
    "END_BURST",
    "HAS_TIME",
    "NOT_SUPPORTED",
    "OVERFLOW",
    "STREAM_ERROR",
    "TIMEOUT",
    "TIME_ERROR",
    "UNDERFLOW",
    "ContinuityState",
    "ReadVerdict",
    "account_read",
    "buffer_fingerprint",
    "outage_samples",
    "read_code_name",
    "reopen_delay_s",
    "stall_limit_s",
]

# Return codes and flags of SoapySDR's readStream: the values in SoapySDR's C headers
# Errors.h and Constants.h (API 0.8); tests compare them with the Python module's constants.
TIMEOUT = -1
STREAM_ERROR = -2
CORRUPTION = -3
OVERFLOW = -4
NOT_SUPPORTED = -5
TIME_ERROR = -6
UNDERFLOW = -7
END_BURST = 1 << 1
HAS_TIME = 1 << 2

_CODE_NAMES = {TIMEOUT: "timeout", STREAM_ERROR: "stream error", CORRUPTION: "corruption",
               OVERFLOW: "overflow", NOT_SUPPORTED: "not supported", TIME_ERROR: "time error",
               UNDERFLOW: "underflow"}

#: Reports after which the next read must start a gap even when nothing measurable is missing:
#: the driver said it threw samples away.
_LOSSY_REPORTS = ("overflow", "corruption")

#: Sample clock error tolerated by the wall-clock check, in ppm. Crystal oscillators of cheap
#: receivers are off by tens of ppm (common practice); 100 ppm leaves margin.
DRIFT_PPM = 100.0

#: Samples compared at each end of a buffer to recognise a repeated buffer.
_FINGERPRINT_SAMPLES = 8


def read_code_name(ret: int) -> str:
    """A readStream result in words: ``"N samples"`` or the error code's name."""
    if ret >= 0:
        return f"{ret} samples"
    return _CODE_NAMES.get(ret, f"error code {ret}")


@dataclass(frozen=True)
class ContinuityState:
    """The account of a stream between reads.

    Attributes
    ----------
    accounted : int
        Samples delivered plus samples counted missing since the account began.
    origin_s : float
        Wall-clock time of sample 0 of the account (seconds).
    lag_ref : float
        Reference lag between wall clock and samples accounted, in samples.
    last_s : float
        Wall-clock time of the last read that returned samples.
    base_ns, base_index : int or None, int
        Hardware time (ns) of sample ``base_index`` of the account; None without time stamps.
    fingerprint : bytes or None
        ``buffer_fingerprint`` of the last buffer.
    """

    accounted: int
    origin_s: float
    lag_ref: float
    last_s: float
    base_ns: int | None
    base_index: int
    fingerprint: bytes | None


@dataclass(frozen=True)
class ReadVerdict:
    """What one read means for the stream.

    Attributes
    ----------
    missing : int
        Samples lost before the read's kept samples (0: continuous).
    drop : int
        Samples at the head of the read that repeat delivered ones, or the whole stale buffer;
        they are not passed on.
    cause : str or None
        ``"overflow"``, ``"corruption"``, ``"stall"``, ``"time-jump"``, ``"late"`` or
        ``"repeat"``; None when the read continues the stream.
    measured_by : str or None
        ``"time"`` (hardware time stamps), ``"content"`` or ``"wallclock"``.
    """

    missing: int = 0
    drop: int = 0
    cause: str | None = None
    measured_by: str | None = None


def buffer_fingerprint(samples: np.ndarray) -> bytes | None:
    """A short digest of a buffer, to recognise the same buffer handed over twice.

    Parameters
    ----------
    samples : numpy.ndarray
        The buffer as read (any dtype). Not modified.

    Returns
    -------
    bytes or None
        Length, first and last samples; None for buffers too short or constant (a muted or
        saturated converter repeats itself legitimately, so such buffers are never judged).

    Notes
    -----
    Two buffers of receiver noise agree in 16 samples with negligible probability, so equal
    fingerprints mean the driver handed over stale memory (common practice).
    """
    n = _FINGERPRINT_SAMPLES
    if samples.shape[0] < 2 * n:
        return None
    head, tail = samples[:n], samples[-n:]
    if np.all(head == head[0]) and np.all(tail == head[0]):
        return None
    return samples.shape[0].to_bytes(8, "little") + head.tobytes() + tail.tobytes()


def _cause(reported: str | None, otherwise: str) -> str:
    """The cause of a gap: the driver's report (a timeout means a stall), else ``otherwise``."""
    if reported == "timeout":
        return "stall"
    return reported or otherwise


def account_read(count: int, now_s: float, rate: float, state: ContinuityState | None = None,
                 *, time_ns: int | None = None, reported: str | None = None,
                 fingerprint: bytes | None = None, tolerance: float = 0.0,
                 drift_ppm: float = DRIFT_PPM) -> tuple[ReadVerdict, ContinuityState]:
    """Account for one read that returned samples.

    Parameters
    ----------
    count : int
        Samples the read returned (> 0).
    now_s : float
        Wall-clock time (seconds, monotonic) when the read returned.
    rate : float
        Nominal sample rate (samples/s).
    state : ContinuityState or None
        The account after the previous read; None starts a new account (nothing missing).
    time_ns : int or None
        Hardware time of the read's first sample (ns), when the driver gave one.
    reported : str or None
        What the driver reported since the previous read: ``"overflow"``, ``"corruption"``
        or ``"timeout"`` (a stall).
    fingerprint : bytes or None
        ``buffer_fingerprint`` of the read's samples (used without time stamps).
    tolerance : float
        Lag growth (samples) the wall-clock check tolerates: the driver's queue capacity.
    drift_ppm : float
        Sample clock error the wall-clock reference absorbs.

    Returns
    -------
    verdict : ReadVerdict
        Samples missing before the read, samples of the read to drop, cause, method.
    state : ContinuityState
        The account after this read.

    Notes
    -----
    Time stamps: with ``t_b`` the time of sample ``b`` of the account and ``k`` samples
    accounted, the read should start at ``t_b + (k - b) / rate``; the offset in samples,
    rounded, is the loss (positive) or the overlap (negative). Time stamps outrank a lossy
    report: when they show the stream continuous, it is. Wall clock: the lag is
    ``L = (now - origin) * rate - k``; with reference ``R`` (the smallest lag seen, raised by
    ``drift_ppm * rate`` per second since), the loss is ``L - R`` when it exceeds
    ``tolerance``, or after a lossy report whatever its size (at least 0).
    """
    if count <= 0:
        raise ValueError(f"count must be > 0 (got {count})")
    if state is None:
        # the read's samples span the time just before it returned: the lag starts at zero
        start = ContinuityState(count, now_s - count / rate, 0.0, now_s, time_ns, 0,
                                fingerprint)
        return ReadVerdict(), start
    verdict = ReadVerdict()
    if time_ns is not None and state.base_ns is not None:
        expected = state.base_ns + (state.accounted - state.base_index) * 1e9 / rate
        offset = round((time_ns - expected) * rate / 1e9)
        if offset > 0:
            verdict = ReadVerdict(offset, 0, _cause(reported, "time-jump"), "time")
        elif offset < 0:
            verdict = ReadVerdict(0, min(count, -offset), "repeat", "time")
    elif (time_ns is None and fingerprint is not None
          and fingerprint == state.fingerprint):
        verdict = ReadVerdict(count, count, "repeat", "content")
    elif time_ns is None:
        lag = (now_s - state.origin_s) * rate - (state.accounted + count)
        ref = state.lag_ref + drift_ppm * 1e-6 * rate * max(0.0, now_s - state.last_s)
        excess = lag - ref
        if reported in _LOSSY_REPORTS:
            verdict = ReadVerdict(max(0, math.floor(excess + 0.5)), 0, reported, "wallclock")
        elif excess > tolerance:
            verdict = ReadVerdict(math.floor(excess + 0.5), 0, _cause(reported, "late"),
                                  "wallclock")
    accounted = state.accounted + verdict.missing + count - verdict.drop
    lag = (now_s - state.origin_s) * rate - accounted
    ref = min(state.lag_ref + drift_ppm * 1e-6 * rate * max(0.0, now_s - state.last_s), lag)
    if time_ns is None:
        base_ns, base_index = None, accounted
    elif verdict.missing or verdict.drop or state.base_ns is None:
        # re-anchor the time base on the first sample kept from this read
        base_ns = time_ns + round(verdict.drop * 1e9 / rate)
        base_index = accounted - (count - verdict.drop)
    else:
        base_ns, base_index = state.base_ns, state.base_index
    return verdict, ContinuityState(accounted, state.origin_s, ref, now_s, base_ns, base_index,
                                    fingerprint)


def outage_samples(last_s: float, now_s: float, count: int, rate: float) -> int:
    """Samples missed while a device was gone, judged by the wall clock.

    Parameters
    ----------
    last_s : float
        Wall-clock time of the last read before the device was lost.
    now_s : float
        Wall-clock time of the first read kept after it came back.
    count : int
        Samples in that read (they span the time just before ``now_s``).
    rate : float
        Sample rate (samples/s).

    Returns
    -------
    int
        ``round((now - last) * rate) - count``, at least 0.
    """
    return max(0, math.floor((now_s - last_s) * rate + 0.5) - count)


def stall_limit_s(buffer_samples: int, rate: float) -> float:
    """Silence after which a device counts as lost: max(1 s, 4 buffer periods)."""
    return max(1.0, 4.0 * buffer_samples / rate)


def reopen_delay_s(attempt: int, first_s: float = 0.25, cap_s: float = 10.0) -> float:
    """Wait before reopen attempt ``attempt + 1``: doubling from ``first_s`` up to ``cap_s``.

    Exponential backoff (common practice): a device that comes back at once is found at once,
    one that stays away costs one attempt every ``cap_s`` seconds.
    """
    return min(cap_s, first_s * 2.0 ** min(attempt, 30))
