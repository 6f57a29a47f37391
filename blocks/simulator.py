"""The simulated transmitter and channel: the ``sim`` source and the ``channel`` block.

``sim`` keys a test pattern (a PRBS, or packets with PRBS9 payloads) onto OOK, 2-FSK / GFSK,
DBPSK or pi/4-DQPSK at any sample rate, and passes it through the simulated channel
(``blocks/_channel.py``): Rayleigh fading, carrier offset, random start phase, phase noise and
white Gaussian noise set by Eb/N0. ``channel`` applies the same channel to any complex stream,
plus a transmitter sample-clock error (``blocks/_resample.py``); the sim models that error
by keying at the offset symbol rate instead. Either way a positive ``clock_ppm`` makes the
symbols arrive faster: fewer samples per symbol at the nominal sample rate.

Nothing here transmits: the signal exists only as samples. Anyone who feeds such samples to a
radio transmitter needs the licence, or the licence-exempt band rules, of the place where it
runs; local regulations come first.
"""

from __future__ import annotations

import math
from typing import ClassVar

import numpy as np

from blocks._channel import ChannelState, apply_channel, awgn_variance, design_channel
from blocks._modulate import (
    BITS_PER_SYMBOL,
    MODULATIONS,
    PULSES,
    SILENT,
    ModulatorState,
    bits_to_symbols,
    design_modulator,
    modulate,
)
from blocks._packets import DEFAULT_SYNC_WORD, packet_bits
from blocks._prbs import PRBS_NAMES, prbs_sequence
from blocks._resample import (
    MAX_CLOCK_PPM,
    ResamplerState,
    design_resampler,
    resample,
    resample_tail,
    resampled_index,
)
from stream.block import Block, Port, Source, StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from stream.params import REQUIRED, Param

__all__ = ["ChannelBlock", "SimSource"]

#: The payload pattern of ``pattern = "packets"``.
PAYLOAD_PRBS = "prbs9"

_CHANNEL_PARAMS: tuple[Param, ...] = (
    Param("ebn0_db", float, math.inf, unit="dB", low=-50, finite=False,
          doc="Eb/N0 of the added white Gaussian noise (inf: no noise)"),
    Param("cfo_hz", float, 0.0, unit="Hz", doc="carrier frequency offset"),
    Param("linewidth_hz", float, 0.0, unit="Hz", low=0,
          doc="oscillator linewidth of the Wiener phase noise (0: none)"),
    Param("fading_doppler_hz", float, 0.0, unit="Hz", low=0,
          doc="maximum Doppler shift of flat Rayleigh fading (0: no fading)"),
    Param("random_phase", bool, True, doc="start the carrier at a random phase"),
    Param("seed", int, 1, low=0, doc="seed of every random draw (noise, phase, fading)"),
)


def _design_channel(p, rate: float, signal_power: float, bit_rate: float):
    """Channel of a block's parameters; range problems reported against the parameter."""
    if abs(p.cfo_hz) >= rate / 2:
        raise ParamError("cfo_hz", f"must be below half the sample rate {rate / 2:g} Hz in "
                         f"magnitude (got {p.cfo_hz:g})")
    if p.linewidth_hz > rate:
        raise ParamError("linewidth_hz", f"must be at most the sample rate {rate:g} Hz "
                         f"(got {p.linewidth_hz:g})")
    if p.fading_doppler_hz >= rate / 2:
        raise ParamError("fading_doppler_hz", f"must be below half the sample rate "
                         f"{rate / 2:g} Hz (got {p.fading_doppler_hz:g})")
    variance = awgn_variance(p.ebn0_db, signal_power, bit_rate, rate)
    return design_channel(rate, variance, p.cfo_hz, p.linewidth_hz, p.fading_doppler_hz,
                          p.seed, p.random_phase)


def _channel_readings(p, channel) -> dict[str, float | int | str]:
    return {
        "ebn0_db": p.ebn0_db,
        "noise_variance": channel.noise_variance,
        "cfo_hz": p.cfo_hz,
        "linewidth_hz": p.linewidth_hz,
        "fading_doppler_hz": p.fading_doppler_hz,
        "start_phase_rad": channel.start_phase,
    }


class _SymbolFeed:
    """Symbol codes in transmission order, and the packets that begin among them."""

    def __init__(self, modulation: str, pattern: str, payload_bytes: int, preamble_bits: int,
                 sync_word: int, gap_symbols: int, symbols: int, packets: int) -> None:
        self._modulation = modulation
        self._bps = BITS_PER_SYMBOL[modulation]
        self._pattern = pattern
        self._payload_bytes = payload_bytes
        self._preamble_bits = preamble_bits
        self._sync_word = sync_word
        self._gap = gap_symbols
        self._left = symbols if symbols > 0 else None
        self._packets_left = packets if packets > 0 else None
        self._prbs_state = None
        self._pending = np.zeros(0, np.int8)
        self._pending_packet: tuple[int, int] | None = None   # (offset in pending, number)
        self._taken = 0
        self.packets_made = 0

    @property
    def exhausted(self) -> bool:
        """Whether every symbol has been taken."""
        return self._left == 0 or self.packets_done

    @property
    def packets_done(self) -> bool:
        """Whether the stream ended because the last of ``packets`` was taken whole."""
        return (self._pattern == "packets" and self._packets_left == 0
                and self._pending.shape[0] == 0 and self._left != 0)

    def _next_packet(self) -> None:
        bits, self._prbs_state = prbs_sequence(PAYLOAD_PRBS, 8 * self._payload_bytes,
                                               self._prbs_state)
        payload = np.packbits(bits).tobytes()
        codes = bits_to_symbols(packet_bits(payload, self._preamble_bits, self._sync_word),
                                self._modulation)
        self._pending = np.concatenate([np.full(self._gap, SILENT, np.int8), codes])
        self._pending_packet = (self._gap, self.packets_made)
        self.packets_made += 1
        if self._packets_left is not None:
            self._packets_left -= 1

    def _take_packets(self, count: int) -> tuple[np.ndarray, list[tuple[int, int]]]:
        out, starts, got = [], [], 0
        while got < count:
            if self._pending.shape[0] == 0:
                if self._packets_left == 0:
                    break
                self._next_packet()
            piece = self._pending[:count - got]
            if self._pending_packet is not None and self._pending_packet[0] < piece.shape[0]:
                offset, number = self._pending_packet
                starts.append((self._taken + got + offset, number))
                self._pending_packet = None
            elif self._pending_packet is not None:
                offset, number = self._pending_packet
                self._pending_packet = (offset - piece.shape[0], number)
            self._pending = self._pending[piece.shape[0]:]
            out.append(piece)
            got += piece.shape[0]
        return (np.concatenate(out) if out else np.zeros(0, np.int8)), starts

    def take(self, count: int) -> tuple[np.ndarray, list[tuple[int, int]]]:
        """Up to ``count`` symbol codes, and ``(symbol index, packet number)`` of packet starts.

        Fewer are returned only at the end of the stream.
        """
        if self._left is not None:
            count = min(count, self._left)
        if self._pattern == "packets":
            codes, starts = self._take_packets(count)
        else:
            bits, self._prbs_state = prbs_sequence(self._pattern, count * self._bps,
                                                   self._prbs_state)
            codes, starts = bits_to_symbols(bits, self._modulation), []
        self._taken += codes.shape[0]
        if self._left is not None:
            self._left -= codes.shape[0]
        return codes, starts


class SimSource(Source):
    """Simulated transmitter and channel: a keyed test pattern with noise and impairments."""

    kind = "sim"
    outputs = (Port("out", "complex64", "simulated received complex baseband"),)
    params: ClassVar[tuple[Param, ...]] = (
        *Source.common_params,
        Param("modulation", str, REQUIRED, choices=MODULATIONS, doc="keying"),
        Param("symbol_rate", float, REQUIRED, unit="Bd", low=0, low_open=True,
              doc="nominal symbol rate"),
        Param("pulse", str, "rect", choices=PULSES,
              doc="pulse shape: rect; rrc for ook/dbpsk/dqpsk; gaussian (GFSK) for 2fsk"),
        Param("rolloff", float, 0.35, low=0, high=1, doc="root-raised-cosine roll-off"),
        Param("bt", float, 0.5, low=0.1, high=10, doc="GFSK Gaussian bandwidth-time product"),
        Param("span_symbols", int, 8, unit="symbols", low=1, high=64,
              doc="length of rrc and gaussian pulses"),
        Param("deviation_hz", float, None, unit="Hz", low=0, low_open=True,
              doc="2fsk peak deviation, tones at +/- deviation (default: symbol_rate / 2)"),
        Param("pattern", str, "prbs15", choices=(*PRBS_NAMES, "packets"),
              doc="bits sent: a continuous PRBS, or packets with PRBS9 payloads"),
        Param("payload_bytes", int, 16, unit="bytes", low=0, high=255,
              doc="packet payload length"),
        Param("preamble_bits", int, 32, unit="bits", low=0, high=4096,
              doc="packet preamble length (1010...)"),
        Param("sync_word", int, DEFAULT_SYNC_WORD, low=0, high=(1 << 32) - 1,
              doc="packet sync word (32 bits)"),
        Param("gap_symbols", int, 64, unit="symbols", low=0,
              doc="silence before each packet (and after the last of `packets`)"),
        Param("clock_ppm", float, 0.0, unit="ppm", low=-1e4, high=1e4,
              doc="transmitter symbol clock error (symbol rate x (1 + ppm / 1e6))"),
        *_CHANNEL_PARAMS,
        Param("symbols", int, 0, unit="symbols", low=0,
              doc="symbol periods to send, gaps included (0: endless)"),
        Param("packets", int, 0, low=0, doc="packets to send (0: endless; pattern packets)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        p = self.p
        rate = self.rate
        symbol_rate = p.symbol_rate * (1.0 + p.clock_ppm * 1e-6)
        self._check(rate, symbol_rate)
        self._mod = design_modulator(p.modulation, symbol_rate, rate, p.pulse, p.rolloff, p.bt,
                                     p.span_symbols, p.deviation_hz)
        clock = self._mod.clock
        self._symbol_rate = rate * clock.symbols / clock.samples
        self._bit_rate = self._symbol_rate * self._mod.bits_per_symbol
        self._channel = _design_channel(p, rate, 1.0, self._bit_rate)
        self._feed = _SymbolFeed(p.modulation, p.pattern, p.payload_bytes, p.preamble_bits,
                                 p.sync_word, p.gap_symbols, p.symbols, p.packets)
        self._mod_state: ModulatorState | None = None
        self._chan_state: ChannelState | None = None
        self._held = np.zeros(0, np.complex64)
        self._notes: list[Annotation] = []
        self._tail_fed = False
        self._packets_sent = 0
        return super().setup(inputs)

    def _check(self, rate: float, symbol_rate: float) -> None:
        p = self.p
        sps = rate / symbol_rate
        if p.pulse == "rrc" and p.modulation == "2fsk":
            raise ParamError("pulse", "must be rect or gaussian for 2fsk (got 'rrc')")
        if p.pulse == "gaussian" and p.modulation != "2fsk":
            raise ParamError("pulse", f"gaussian is for 2fsk only (got modulation "
                             f"{p.modulation!r})")
        if p.pulse == "rrc":
            if rate < (1.0 + p.rolloff) * symbol_rate:
                raise ParamError("sample_rate", f"must be at least (1 + rolloff) x symbol "
                                 f"rate = {(1 + p.rolloff) * symbol_rate:g} Hz for rrc pulses "
                                 f"(got {rate:g})")
        elif sps < 2.0:
            raise ParamError("sample_rate", f"must be at least 2 x symbol rate = "
                             f"{2 * symbol_rate:g} Hz (got {rate:g})")
        if p.modulation == "2fsk":
            dev = symbol_rate / 2 if p.deviation_hz is None else p.deviation_hz
            if dev >= rate / 2:
                raise ParamError("deviation_hz", f"must be below half the sample rate "
                                 f"{rate / 2:g} Hz (got {dev:g})")
            if rate < 2 * dev + symbol_rate:
                raise ParamError("sample_rate", f"must be at least 2 x deviation + symbol "
                                 f"rate = {2 * dev + symbol_rate:g} Hz, the Carson bandwidth "
                                 f"of this 2fsk signal (got {rate:g})")
        elif p.deviation_hz is not None:
            raise ParamError("deviation_hz", f"applies to 2fsk only (got modulation "
                             f"{p.modulation!r})")
        if p.pattern == "packets":
            if p.modulation == "dqpsk" and p.preamble_bits % 2:
                raise ParamError("preamble_bits", f"must be even for dqpsk, which sends two "
                                 f"bits per symbol (got {p.preamble_bits})")
        elif p.packets:
            raise ParamError("packets", f"needs pattern = 'packets' (got pattern "
                             f"{p.pattern!r})")

    def _modulate_more(self, upto: int) -> None:
        """Modulate until samples ``0 .. upto - 1`` exist or the stream has ended."""
        clock = self._mod.clock
        done = 0 if self._mod_state is None else self._mod_state.symbols_in
        made = 0 if self._mod_state is None else self._mod_state.samples_out
        while made < upto and not self._tail_fed:
            need = max(1, clock.symbols_covering(upto) - done)
            codes, starts = self._feed.take(need)
            if self._feed.exhausted:
                # Flush the pulse tails; after the last of a number of packets, also one more
                # gap of silence, so a receiver's latency does not cut the last packet short.
                tail = self._mod.memory - 1 + (self.p.gap_symbols if self._feed.packets_done
                                               else 0)
                codes = np.concatenate([codes, np.full(tail, SILENT, np.int8)])
                self._tail_fed = True
            y, self._mod_state = modulate(codes, self._mod, self._mod_state)
            for k, number in starts:
                self._notes.append(Annotation(
                    self._mod.symbol_start_sample(k), "packet",
                    {"packet": number, "payload_bytes": self.p.payload_bytes, "symbol": k}))
            self._held = np.concatenate([self._held, y])
            done, made = self._mod_state.symbols_in, self._mod_state.samples_out

    def produce(self) -> bool:
        start = self.position()
        self._modulate_more(start + self.p.chunk_size)
        x, self._held = self._held[:self.p.chunk_size], self._held[self.p.chunk_size:]
        stop = start + x.shape[0]
        notes = tuple(a for a in self._notes if a.index < stop)
        self._notes = [a for a in self._notes if a.index >= stop]
        self._packets_sent += len(notes)
        y, self._chan_state = apply_channel(x, self._channel, self._chan_state)
        self.emit(y, annotations=notes)
        return not (self._tail_fed and self._held.shape[0] == 0)

    def readings(self) -> dict[str, float | int | str]:
        if not hasattr(self, "_mod"):
            return {}
        bps = self._mod.bits_per_symbol
        return {
            "modulation": self.p.modulation,
            "symbol_rate": self._symbol_rate,
            "samples_per_symbol": self._mod.clock.samples_per_symbol,
            "pulse_delay_symbols": self._mod.delay_symbols,
            "esn0_db": self.p.ebn0_db + 10 * math.log10(bps),
            **_channel_readings(self.p, self._channel),
            "clock_ppm": self.p.clock_ppm,
            "samples": self.position(),
            "symbols": 0 if self._mod_state is None else self._mod_state.symbols_in,
            "packets": self._packets_sent,
        }


class ChannelBlock(Block):
    """Simulated channel on a complex stream: clock error, CFO, phase noise, fading, noise.

    The order follows the signal: the clock error belongs to the transmitter, so the input is
    resampled first (output sample ``n`` is the input at ``n (1 + clock_ppm 1e-6)`` input
    samples, at the unchanged nominal rate); the fading, carrier offset, phase noise and
    noise are then applied on the receiver's sample grid. Annotations move to the first
    output sample at or after their input sample. With a clock error the last few outputs
    wait for the next input chunk (or the end of the stream).
    """

    kind = "channel"
    inputs = (Port("in", "complex64", "complex baseband"),)
    outputs = (Port("out", "complex64", "the same stream through the channel"),)
    params: ClassVar[tuple[Param, ...]] = (
        Param("bit_rate", float, None, unit="bit/s", low=0, low_open=True,
              doc="information bit rate of the input (needed when ebn0_db is finite)"),
        Param("signal_power", float, 1.0, low=0, low_open=True,
              doc="mean |x|^2 of the input while transmitting (the sim's is 1)"),
        Param("clock_ppm", float, 0.0, unit="ppm", low=-MAX_CLOCK_PPM, high=MAX_CLOCK_PPM,
              low_open=True, high_open=True,
              doc="transmitter sample clock error: the input replayed (1 + ppm / 1e6) x fast"),
        *_CHANNEL_PARAMS,
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        rate = next(iter(inputs.values())).rate
        bit_rate = self.p.bit_rate
        if bit_rate is None:
            if math.isfinite(self.p.ebn0_db):
                raise ParamError("bit_rate", f"is required when ebn0_db is finite "
                                 f"(got ebn0_db {self.p.ebn0_db:g})")
            bit_rate = 1.0
        self._channel = _design_channel(self.p, rate, self.p.signal_power, bit_rate)
        self._state: ChannelState | None = None
        self._resampler = design_resampler(self.p.clock_ppm) if self.p.clock_ppm else None
        self._clock_state: ResamplerState | None = None
        self._notes: list[Annotation] = []
        return super().setup(inputs)

    def _emit(self, x: np.ndarray, last: bool = False) -> None:
        """Pass resampled samples through the rest of the channel and emit them."""
        y, self._state = apply_channel(x, self._channel, self._state)
        stop = self.position() + y.shape[0]
        notes = [a for a in self._notes if last or a.index < stop]
        self._notes = [a for a in self._notes if not (last or a.index < stop)]
        self.emit(y, annotations=notes)

    def process(self, chunk: Chunk) -> None:
        if self._resampler is None:
            self._notes.extend(chunk.annotations)
            self._emit(chunk.samples)
            return
        self._notes.extend(a.moved(resampled_index(self._resampler, a.index))
                           for a in chunk.annotations)
        x, self._clock_state = resample(chunk.samples, self._resampler, self._clock_state)
        self._emit(x)

    def finish(self) -> None:
        if self._resampler is not None:
            self._emit(resample_tail(self._resampler, self._clock_state), last=True)

    def readings(self) -> dict[str, float | int | str]:
        if not hasattr(self, "_channel"):
            return {}
        return {**_channel_readings(self.p, self._channel), "clock_ppm": self.p.clock_ppm}
