"""The run's figures in the Prometheus text exposition format, built at scrape time.

The official client library (``prometheus_client``) writes the exposition; this module only
maps a status record (``Runner.status()`` plus the host figures) onto metric families, so a
scrape always shows the run as it is now and nothing is kept between scrapes.

Metric families (every name starts with ``phasefree_``; counters end in ``_total``):

=========================================  =========  ==========================================
name                                       type       labels, meaning
=========================================  =========  ==========================================
``phasefree_run_seconds``                  gauge      pipeline; seconds since the run started
``phasefree_block_samples_in_total``       counter    block, kind; samples received
``phasefree_block_samples_out_total``      counter    block, kind; samples emitted
``phasefree_block_chunks_in_total``        counter    block, kind; chunks received
``phasefree_block_chunks_out_total``       counter    block, kind; chunks emitted
``phasefree_block_busy_seconds_total``     counter    block, kind; time spent in the block's code
``phasefree_block_busy_ratio``             gauge      block, kind; busy time / run time
``phasefree_ber``                          gauge      block; measured bit error ratio
``phasefree_ber_lower`` / ``_upper``       gauge      block; its confidence interval
``phasefree_bits_total``                   counter    block; bits compared
``phasefree_bit_errors_total``             counter    block; bit errors counted
``phasefree_sync_losses_total``            counter    block; pattern or frame sync losses
``phasefree_packets_total``                counter    block; packets received
``phasefree_errored_packets_total``        counter    block; packets with bit errors
``phasefree_crc_failures_total``           counter    block; packets failing their CRC
``phasefree_ebn0_db_estimate``             gauge      block; estimated Eb/N0 in dB
``phasefree_esn0_db_estimate``             gauge      block; estimated Es/N0 in dB
``phasefree_cfo_hz_estimate``              gauge      block; estimated carrier offset in Hz
``phasefree_eye_opening_ratio``            gauge      block; eye opening (0 closed .. 1 open)
``phasefree_eye_q_factor``                 gauge      block; eye Q, level distance over spreads
``phasefree_reading``                      gauge      block, kind, name; any other numeric
                                                      reading (a source's settings among them:
                                                      a simulator's ``ebn0_db`` is its set value,
                                                      not an estimate, so it is reported here)
``phasefree_link_sent_total`` ...          counter    link, tap; ``sent``, ``received``,
                                                      ``dropped``, ``gaps``, ``rejected``
``phasefree_link_depth``                   gauge      link, tap; chunks waiting in the link
``phasefree_host_cpus``                    gauge      CPUs the host has
``phasefree_host_load_average``            gauge      window (1m, 5m, 15m); run-queue average
``phasefree_host_cpu_busy_ratio``          gauge      fraction of CPU time not idle
``phasefree_host_temperature_celsius``     gauge      zone; thermal zone temperature
``phasefree_host_slowdown``                gauge      condition; 1 while the board reports it
``phasefree_process_...``                  various    the library's process collector (resident
                                                      memory, open file descriptors, CPU time)
=========================================  =========  ==========================================

String readings (a pattern name, a modulation) are in ``/status`` only. Host figures the
machine does not report are absent, never zero.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Set
from typing import Any

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.process_collector import ProcessCollector
from prometheus_client.registry import Collector

__all__ = ["CONTENT_TYPE", "READING_METRICS", "RunCollector", "exposition"]

#: The exposition format's media type (text format 0.0.4).
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"

_PREFIX = "phasefree_"

#: Reading name -> (metric name without prefix, "gauge" | "counter", help text). Readings of
#: non-source blocks only: a source's readings are its settings (see ``phasefree_reading``).
READING_METRICS: dict[str, tuple[str, str, str]] = {
    "ber": ("ber", "gauge", "Measured bit error ratio"),
    "ber_low": ("ber_lower", "gauge", "Lower end of the BER confidence interval"),
    "ber_high": ("ber_upper", "gauge", "Upper end of the BER confidence interval"),
    "bits": ("bits", "counter", "Bits compared against the test pattern"),
    "errors": ("bit_errors", "counter", "Bit errors counted"),
    "sync_losses": ("sync_losses", "counter", "Losses of pattern or frame synchronisation"),
    "packets": ("packets", "counter", "Packets received"),
    "errored_packets": ("errored_packets", "counter", "Packets with at least one bit error"),
    "crc_failures": ("crc_failures", "counter", "Packets whose CRC failed"),
    "ebn0_db": ("ebn0_db_estimate", "gauge", "Estimated Eb/N0 in dB"),
    "esn0_db": ("esn0_db_estimate", "gauge", "Estimated Es/N0 in dB"),
    "cfo_hz": ("cfo_hz_estimate", "gauge", "Estimated carrier frequency offset in Hz"),
    "eye_opening": ("eye_opening_ratio", "gauge", "Eye opening, 0 closed to 1 fully open"),
    "eye_q": ("eye_q_factor", "gauge", "Eye Q factor, level distance over the sum of spreads"),
}

_BLOCK_COUNTERS = (
    ("samples_in", "block_samples_in", "Samples received by the block"),
    ("samples_out", "block_samples_out", "Samples emitted by the block"),
    ("chunks_in", "block_chunks_in", "Chunks received by the block"),
    ("chunks_out", "block_chunks_out", "Chunks emitted by the block"),
    ("busy_s", "block_busy_seconds", "Seconds spent in the block's own code"),
)
_BLOCK_FIELDS = {"kind", "samples_in", "samples_out", "chunks_in", "chunks_out", "busy_s", "busy"}
_LINK_COUNTERS = (
    ("sent", "Chunks sent into the link"),
    ("received", "Chunks taken out of the link"),
    ("dropped", "Chunks a tap dropped because its observer was behind"),
    ("gaps", "Gaps in the link's sequence numbers (lost chunks)"),
    ("rejected", "Malformed messages rejected by the link's decoder"),
)


def _number(value: Any) -> float | None:
    """A reading as a float, or None for strings, None and other non-numbers."""
    if isinstance(value, bool):
        return float(value)
    if isinstance(value, (int, float)):
        return float(value)
    return None


class RunCollector(Collector):
    """A collector that turns a fresh status record into metric families on every scrape.

    Parameters
    ----------
    read_status : callable
        Returns the record to expose: ``Runner.status()`` with a ``host`` entry
        (``HostProbe.read()``) added, or without one.
    sources : set of str
        Ids of the source blocks, whose readings are settings and go to ``phasefree_reading``.
    """

    def __init__(self, read_status: Callable[[], dict[str, Any]],
                 sources: Set[str] = frozenset()) -> None:
        self.read_status = read_status
        self.sources = frozenset(sources)

    def describe(self) -> list[Metric]:
        """Nothing up front: the families depend on the pipeline and are made per scrape."""
        return []

    def collect(self) -> Iterator[Metric]:
        """The families of one status record (see the module docstring)."""
        status = self.read_status()
        run = GaugeMetricFamily(_PREFIX + "run_seconds", "Seconds since the run started",
                                labels=["pipeline"])
        run.add_metric([str(status.get("pipeline", ""))], float(status.get("seconds", 0.0)))
        yield run
        yield from self._blocks(status.get("blocks", {}))
        yield from self._links(status.get("links", {}))
        yield from _host_metrics(status.get("host", {}))

    def _blocks(self, blocks: dict[str, dict[str, Any]]) -> Iterator[Metric]:
        counters = {field: CounterMetricFamily(_PREFIX + name, doc, labels=["block", "kind"])
                    for field, name, doc in _BLOCK_COUNTERS}
        busy = GaugeMetricFamily(_PREFIX + "block_busy_ratio",
                                 "Fraction of the run time spent in the block's own code",
                                 labels=["block", "kind"])
        readings: dict[str, Metric] = {}
        generic = GaugeMetricFamily(_PREFIX + "reading", "A block's other numeric readings",
                                    labels=["block", "kind", "name"])
        for bid, b in blocks.items():
            kind = str(b.get("kind", ""))
            for field, family in counters.items():
                family.add_metric([bid, kind], float(b.get(field, 0)))
            busy.add_metric([bid, kind], float(b.get("busy", 0.0)))
            for name, value in b.items():
                number = _number(value)
                if name in _BLOCK_FIELDS or number is None:
                    continue
                known = READING_METRICS.get(name)
                if known is None or bid in self.sources:
                    generic.add_metric([bid, kind, name], number)
                    continue
                metric, mtype, doc = known
                if metric not in readings:
                    cls = CounterMetricFamily if mtype == "counter" else GaugeMetricFamily
                    readings[metric] = cls(_PREFIX + metric, doc, labels=["block"])
                readings[metric].add_metric([bid], number)
        yield from counters.values()
        yield busy
        yield from readings.values()
        yield generic

    @staticmethod
    def _links(links: dict[str, dict[str, Any]]) -> Iterator[Metric]:
        counters = {field: CounterMetricFamily(_PREFIX + f"link_{field}", doc,
                                               labels=["link", "tap"])
                    for field, doc in _LINK_COUNTERS}
        depth = GaugeMetricFamily(_PREFIX + "link_depth", "Chunks waiting in the link",
                                  labels=["link", "tap"])
        for label, s in links.items():
            tap = "true" if s.get("tap") else "false"
            for field, family in counters.items():
                family.add_metric([label, tap], float(s.get(field, 0)))
            depth.add_metric([label, tap], float(s.get("depth", 0)))
        yield from counters.values()
        yield depth


def _host_metrics(host: dict[str, Any]) -> Iterator[Metric]:
    if "cpus" in host:
        yield GaugeMetricFamily(_PREFIX + "host_cpus", "CPUs of the host", value=host["cpus"])
    windows = [(w, host[f"load_{w}"]) for w in ("1m", "5m", "15m") if f"load_{w}" in host]
    if windows:
        load = GaugeMetricFamily(_PREFIX + "host_load_average", "Run-queue load average",
                                 labels=["window"])
        for window, value in windows:
            load.add_metric([window], float(value))
        yield load
    if "cpu_busy" in host:
        yield GaugeMetricFamily(_PREFIX + "host_cpu_busy_ratio",
                                "Fraction of CPU time not idle", value=host["cpu_busy"])
    if host.get("temperatures_c"):
        temp = GaugeMetricFamily(_PREFIX + "host_temperature_celsius",
                                 "Thermal zone temperature", labels=["zone"])
        for zone, value in host["temperatures_c"].items():
            temp.add_metric([zone], float(value))
        yield temp
    if "slowdown" in host:
        flags = GaugeMetricFamily(_PREFIX + "host_slowdown",
                                  "1 while the board reports the condition (firmware word)",
                                  labels=["condition"])
        for name, value in host["slowdown"].items():
            if name != "word":
                flags.add_metric([name], float(value))
        yield flags


def exposition(collector: RunCollector, process: bool = True) -> Callable[[], bytes]:
    """A function that renders one scrape of ``collector`` (and the process's own figures).

    A private registry keeps the library's default (process-global) one out of it, so two runs
    in one process never see each other's metrics.
    """
    registry = CollectorRegistry(auto_describe=False)
    registry.register(collector)
    if process:
        ProcessCollector(namespace="phasefree", registry=registry)
    return lambda: generate_latest(registry)
