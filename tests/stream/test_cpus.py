"""Where a run's block threads run (``stream.cpus``): one core per process unless told."""

from __future__ import annotations

import os
import sys
import threading

import pytest

from stream.cpus import (
    BACKGROUND_STEP,
    CpuSettingError,
    allowed_cpus,
    background_priority,
    batch_policy,
    choose_cpus,
    parse_cpus,
    pinned,
)
from stream.errors import PipelineError
from stream.loader import pipeline_from_dict
from stream.runner import Runner
from tests.stream import kinds  # noqa: F401  (registers test_cores)

ALLOWED = allowed_cpus()
needs_two = pytest.mark.skipif(ALLOWED is None or len(ALLOWED) < 2,
                               reason="needs Linux affinity and at least two cores")


def _doc(**head) -> dict:
    return {"pipeline": {"sample_rate": 48_000.0, "links": ["src -> probe -> sink"], **head},
            "blocks": {"src": {"kind": "tone", "frequency_hz": 1000.0, "samples": 40_000,
                               "chunk_size": 4096},
                       "probe": {"kind": "test_cores"},
                       "sink": {"kind": "discard"}}}


@pytest.mark.parametrize(("text", "cores"), [("0", (0,)), ([0], (0,)), (0, (0,)),
                                             ("0-0", (0,)), (" 0 , 0", (0,))])
def test_core_lists_are_read_as_numbers_and_ranges(text, cores):
    assert parse_cpus(text) == cores


@pytest.mark.parametrize("word", ["auto", "ALL", " all "])
def test_words_are_read_case_blind(word):
    assert parse_cpus(word) == word.strip().lower()


@pytest.mark.parametrize("bad", ["x", "1-0", "-1", [], [True], True, 1.5, "2,a"])
def test_a_bad_setting_names_what_is_expected(bad):
    with pytest.raises(CpuSettingError, match="core"):
        parse_cpus(bad)


@pytest.mark.skipif(ALLOWED is None, reason="needs Linux affinity")
def test_a_core_outside_the_allowed_set_is_refused_with_the_allowed_set():
    missing = max(ALLOWED) + 1
    with pytest.raises(CpuSettingError, match=f"core {missing} is not available"):
        parse_cpus([missing])


@needs_two
def test_auto_gives_each_part_its_own_core_and_an_undivided_run_one_core():
    assert choose_cpus("auto", 0) == {ALLOWED[0]}
    assert choose_cpus("auto", 1) == {ALLOWED[1]}
    assert len(choose_cpus("auto")) == 1
    assert choose_cpus("all") is None
    assert choose_cpus((ALLOWED[1],)) == {ALLOWED[1]}


@needs_two
def test_threads_started_while_pinned_keep_the_cores_and_the_caller_gets_its_own_back():
    before = os.sched_getaffinity(0)
    seen: list[set[int]] = []
    with pinned(frozenset({ALLOWED[1]})):
        t = threading.Thread(target=lambda: seen.append(os.sched_getaffinity(0)))
        t.start()
        t.join()
    assert seen == [{ALLOWED[1]}]
    assert os.sched_getaffinity(0) == before


@needs_two
def test_by_default_the_run_keeps_its_block_threads_on_one_core():
    summary = Runner(pipeline_from_dict(_doc())).run()
    cores = summary["blocks"]["probe"]["cores"]
    assert len(cores) == 1 and summary["cpus"] == cores


@needs_two
def test_the_run_pins_its_block_threads_to_the_cores_the_file_names():
    summary = Runner(pipeline_from_dict(_doc(cpus=[ALLOWED[1]]))).run()
    assert summary["blocks"]["probe"]["cores"] == [ALLOWED[1]] == summary["cpus"]


@needs_two
def test_all_leaves_the_block_threads_where_the_system_puts_them():
    summary = Runner(pipeline_from_dict(_doc(cpus="all"))).run()
    assert summary["cpus"] == "all"
    assert summary["blocks"]["probe"]["cores"] == sorted(os.sched_getaffinity(0))


@needs_two
def test_the_runner_argument_overrides_the_file():
    summary = Runner(pipeline_from_dict(_doc(cpus="all")), cpus=[ALLOWED[0]]).run()
    assert summary["blocks"]["probe"]["cores"] == [ALLOWED[0]]


@pytest.mark.skipif(not hasattr(os, "SCHED_BATCH"), reason="needs Linux scheduling policies")
def test_block_threads_run_under_the_batch_policy_and_the_caller_keeps_its_own():
    # sched(7): SCHED_BATCH, which an unprivileged thread may choose
    before = os.sched_getscheduler(0)
    summary = Runner(pipeline_from_dict(_doc())).run()
    assert summary["blocks"]["probe"]["policy"] == os.SCHED_BATCH
    assert os.sched_getscheduler(0) == before


@pytest.mark.skipif(not hasattr(os, "SCHED_BATCH"), reason="needs Linux scheduling policies")
def test_the_batch_policy_is_the_calling_threads_alone():
    seen: list[tuple[bool, int]] = []

    def inside() -> None:
        seen.append((batch_policy(), os.sched_getscheduler(0)))

    t = threading.Thread(target=inside)
    t.start()
    t.join()
    assert seen == [(True, os.SCHED_BATCH)]
    assert os.sched_getscheduler(0) != os.SCHED_BATCH


def test_a_bad_cpus_key_is_a_pipeline_error_naming_the_key():
    with pytest.raises(PipelineError, match=r"pipeline\.cpus"):
        pipeline_from_dict(_doc(cpus="many"))


def _watched(**head) -> dict:
    """The probe on the receive path, and two probes behind a tap (``watch`` fed by the tap,
    ``after`` fed by ``watch`` over a lossless link)."""
    doc = _doc(**head)
    doc["pipeline"]["links"] = ["src -> probe -> sink", "src ~> watch -> after -> sink2"]
    doc["blocks"].update({"watch": {"kind": "test_cores"}, "after": {"kind": "test_cores"},
                          "sink2": {"kind": "discard"}})
    return doc


def _nice_here() -> int:
    return os.getpriority(os.PRIO_PROCESS, threading.get_native_id())


linux_nice = pytest.mark.skipif(not sys.platform.startswith("linux"),
                                reason="needs per-thread nice values (Linux)")


@linux_nice
def test_observers_run_below_the_receive_path_and_the_caller_keeps_its_priority():
    # setpriority(2), NOTES: on Linux the nice value is per thread
    before = _nice_here()
    summary = Runner(pipeline_from_dict(_watched())).run()
    blocks = summary["blocks"]
    assert summary["observers"] == "background"
    assert blocks["probe"]["nice"] == before
    assert blocks["watch"]["nice"] == blocks["after"]["nice"] == min(19, before
                                                                     + BACKGROUND_STEP)
    assert _nice_here() == before


@linux_nice
@pytest.mark.parametrize("where", ["file", "runner"])
def test_equal_observers_keep_the_receive_paths_priority(where):
    before = _nice_here()
    if where == "file":
        runner = Runner(pipeline_from_dict(_watched(observers="equal")))
    else:
        runner = Runner(pipeline_from_dict(_watched()), observers="equal")
    summary = runner.run()
    assert summary["observers"] == "equal"
    assert {b["nice"] for b in summary["blocks"].values() if "nice" in b} == {before}


@linux_nice
def test_background_priority_is_the_calling_threads_alone():
    before = _nice_here()
    seen: list[tuple[bool, int]] = []

    def inside() -> None:
        seen.append((background_priority(3), _nice_here()))

    t = threading.Thread(target=inside)
    t.start()
    t.join()
    assert seen == [(True, min(19, before + 3))]
    assert _nice_here() == before



def test_a_bad_observers_argument_names_the_settings():
    with pytest.raises(ValueError, match="background, equal"):
        Runner(pipeline_from_dict(_watched()), observers="low")
