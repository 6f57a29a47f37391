"""Which processor cores a run's block threads may use.

Block threads of one process take turns at Python's global interpreter lock. Spread over
several cores they hand the lock from core to core at every numpy call that releases it; each
hand-over wakes a thread on the other core and moves its data there. On the 2-core machine the
benchmark runs on, the DBPSK receiver ran 1.8x faster with all its threads on one core than
spread over both (``tools/bench.py`` measures the runtime on one core for that reason). So by
default a process keeps its block threads on one core, and more cores are used by dividing the
pipeline into parts, one process each (``[parts]`` in the pipeline file).

Settings (``[pipeline] cpus`` or ``phasefree run --cpus``):

- ``"auto"`` (default): one core; a process running part *i* of a divided pipeline takes the
  *i*-th allowed core (so the parts of a pipeline run side by side on one machine), an undivided
  pipeline the core its process is running on when the run starts;
- ``"all"``: leave the threads wherever the operating system puts them;
- a list of core numbers (``[2]``, ``[0, 1]``) or the same as text (``"2"``, ``"0,2-3"``).

Where the operating system offers no affinity call (only Linux has ``os.sched_setaffinity``),
or only one core is allowed anyway, nothing is pinned.

Block threads also run under Linux's batch policy (``SCHED_BATCH``, sched(7)): a thread woken
by a chunk then waits for the running one to block instead of preempting it. On a shared core
the woken consumer could do nothing anyway (the producer holds the interpreter lock) but cost
two context switches. Measured with the four loopback receivers, 10 M samples, one core,
best of 3 (ad-hoc script): involuntary context switches per run 148-187 -> 84-126, runtime /
no-runtime reference 0.84-0.90 -> 0.86-0.93.

The observers (the blocks reached only through taps, ``Pipeline.behind_taps``) run
:data:`BACKGROUND_STEP` nice levels below the receive path (``[pipeline] observers =
"background"``, the default). A tap never makes its producer wait, but on one core an observer
at the same priority still takes its share of the core from the receive path; in the
background it takes what the receive path leaves, so a receiver that keeps real time keeps it
however much watching there is, and on a saturated core (a recording replayed as fast as it
goes) the taps drop the chunks the observers cannot take, counted as always. On Linux the nice
value is a property of each thread (setpriority(2), NOTES), and raising one's own needs no
privilege; elsewhere the observers keep the receive path's priority. Measured with the
benchmark's replay of the four loopback receivers (10 M samples, 64k chunks, one core, best of
5): 51.4 / 50.9 / 58.8 / 57.5 Msamples/s (OOK / 2-FSK / DBPSK / DQPSK) in the background, the
observers taking 33-45 % of the tapped chunks, against 44.3 / 39.7 / 43.9 / 43.1 beside the
receive path; the 2-FSK loopback paced at its 250 kS/s lost no chunk on any tap in 8 s.
"""

from __future__ import annotations

import os
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

__all__ = ["BACKGROUND_STEP", "OBSERVER_POLICIES", "CpuSettingError", "allowed_cpus",
           "background_priority", "batch_policy", "choose_cpus", "parse_cpus", "pinned"]

#: The settings that are words rather than core numbers.
WORDS = ("auto", "all")
#: Settings of ``[pipeline] observers``: observers below the receive path, or beside it.
OBSERVER_POLICIES = ("background", "equal")
#: Nice levels an observer's thread runs below the receive path's (sched(7): -20 .. 19). Under
#: Linux's fair scheduler each level is a factor of about 1.25 in a thread's weight, so an
#: observer 10 levels down weighs about a tenth of a receive-path thread on a contended core.
BACKGROUND_STEP = 10


class CpuSettingError(ValueError):
    """A ``cpus`` setting that is neither a known word nor a list of allowed cores."""


def allowed_cpus() -> list[int] | None:
    """Cores this process may run on, ascending; None where affinity cannot be set."""
    if not hasattr(os, "sched_getaffinity") or not hasattr(os, "sched_setaffinity"):
        return None
    return sorted(os.sched_getaffinity(0))


def parse_cpus(value: Any) -> str | tuple[int, ...]:
    """Read a ``cpus`` setting: ``"auto"``, ``"all"``, or a tuple of core numbers.

    Parameters
    ----------
    value : str, int or list of int
        ``"auto"``, ``"all"``, a core number, a list of them, or text such as ``"0,2-3"``.

    Raises
    ------
    CpuSettingError
        For anything else, or a core this process is not allowed to use.
    """
    if isinstance(value, str) and value.strip().lower() in WORDS:
        return value.strip().lower()
    if isinstance(value, bool):
        raise CpuSettingError(f"expected 'auto', 'all' or core numbers (got {value!r})")
    if isinstance(value, int):
        cores = [value]
    elif isinstance(value, str):
        cores = _parse_ranges(value)
    elif isinstance(value, list | tuple) and value \
            and all(isinstance(v, int) and not isinstance(v, bool) for v in value):
        cores = list(value)
    else:
        raise CpuSettingError(f"expected 'auto', 'all' or core numbers (got {value!r})")
    allowed = allowed_cpus()
    if allowed is not None:
        outside = sorted(set(cores) - set(allowed))
        if outside:
            raise CpuSettingError(f"core {outside[0]} is not available to this process "
                                  f"(available: {_ranges(allowed)})")
    return tuple(sorted(set(cores)))


def _parse_ranges(text: str) -> list[int]:
    cores: list[int] = []
    for piece in text.split(","):
        low, dash, high = piece.strip().partition("-")
        try:
            first = int(low)
            last = int(high) if dash else first
        except ValueError:
            raise CpuSettingError(f"expected 'auto', 'all' or core numbers such as '0,2-3' "
                                  f"(got {text!r})") from None
        if first < 0 or last < first:
            raise CpuSettingError(f"bad core range {piece.strip()!r} in {text!r}")
        cores.extend(range(first, last + 1))
    return cores


def _ranges(cores: list[int]) -> str:
    """``[0, 1, 2, 5]`` -> ``"0-2,5"``."""
    out: list[str] = []
    start = prev = cores[0]
    for core in [*cores[1:], None]:
        if core is not None and core == prev + 1:
            prev = core
            continue
        out.append(f"{start}" if start == prev else f"{start}-{prev}")
        if core is not None:
            start = prev = core
    return ",".join(out)


def current_cpu() -> int | None:
    """The core the calling thread runs on now (Linux ``/proc``), or None if unknown."""
    try:
        with open("/proc/thread-self/stat", encoding="ascii") as f:
            stat = f.read()
        # fields after the command name in parentheses; "processor" is field 39 of proc(5)
        return int(stat.rpartition(")")[2].split()[36])
    except (OSError, ValueError, IndexError):
        return None


def choose_cpus(setting: str | tuple[int, ...], part_index: int | None = None,
                ) -> frozenset[int] | None:
    """The cores to pin a run's block threads to, or None to leave them be.

    Parameters
    ----------
    setting : str or tuple of int
        A parsed setting (``parse_cpus``).
    part_index : int or None
        Position of the part this process runs among the pipeline's parts (None: undivided).
    """
    allowed = allowed_cpus()
    if allowed is None or setting == "all":
        return None
    if setting != "auto":
        return frozenset(setting)
    if len(allowed) < 2:
        return None
    if part_index is not None:
        return frozenset({allowed[part_index % len(allowed)]})
    here = current_cpu()
    return frozenset({here if here in allowed else allowed[0]})


@contextmanager
def pinned(cpus: frozenset[int] | None) -> Iterator[None]:
    """Run the body with the calling thread on ``cpus``; threads it starts keep them.

    A thread inherits its creator's affinity when it is created, so block threads started
    inside the body stay on ``cpus`` while the calling thread gets its own affinity back.
    """
    if cpus is None:
        yield
        return
    before = os.sched_getaffinity(0)
    os.sched_setaffinity(0, cpus)
    try:
        yield
    finally:
        os.sched_setaffinity(0, before)


def batch_policy() -> bool:
    """Put the calling thread under ``SCHED_BATCH`` (module docstring); True if it is now.

    Leaving the normal policy for the batch one needs no privilege; where the system has no
    such policy or refuses (another operating system, a sandbox), the thread keeps its own.
    """
    if not hasattr(os, "SCHED_BATCH"):
        return False
    try:
        os.sched_setscheduler(0, os.SCHED_BATCH, os.sched_param(0))
    except OSError:
        return False
    return True


def background_priority(step: int = BACKGROUND_STEP) -> bool:
    """Lower the calling thread's priority by ``step`` nice levels (module docstring).

    Returns True if it is now lower; False where threads have no nice value of their own
    (not Linux) or the system refuses. The value stops at 19, the lowest.
    """
    if not sys.platform.startswith("linux") or not hasattr(os, "setpriority"):
        return False
    tid = threading.get_native_id()
    try:
        now = os.getpriority(os.PRIO_PROCESS, tid)
        os.setpriority(os.PRIO_PROCESS, tid, min(19, now + step))
    except OSError:
        return False
    return True
