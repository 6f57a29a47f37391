"""The allocator settings of a streaming process (``stream.memory``)."""

from __future__ import annotations

import os
import resource

import numpy as np
import pytest

from stream.memory import keep_freed_memory

GLIBC = (os.confstr("CS_GNU_LIBC_VERSION") or "").startswith("glibc") \
    if hasattr(os, "confstr") and "CS_GNU_LIBC_VERSION" in os.confstr_names else False


@pytest.mark.skipif(not GLIBC, reason="the settings exist only in glibc")
def test_settings_take_and_are_idempotent():
    assert keep_freed_memory()
    assert keep_freed_memory()


@pytest.mark.skipif(not GLIBC, reason="the settings exist only in glibc")
def test_temporaries_freed_and_made_again_reuse_their_pages():
    # three 6 MiB temporaries per round, as a block's work on a large chunk: with glibc's
    # defaults the freed top of the heap passes the trim threshold and is handed back, and the
    # next round faults every 4 KiB page in again (mallopt(3), M_TRIM_THRESHOLD; seen here:
    # 30220 faults over 20 rounds without the settings); kept memory is reused without faults
    keep_freed_memory()
    size = 6 << 20

    def one_round() -> int:
        a, b, c = (np.ones(size, np.uint8) for _ in range(3))
        return int(a[0] + b[0] + c[0])

    one_round()  # the first round may grow the heap
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(20):
        one_round()
    faults = resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before
    pages = 20 * 3 * size // 4096
    assert faults < pages // 20, faults
