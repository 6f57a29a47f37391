"""Received test signals for the synchronisation tests: modulated, shifted, noisy.

Built with the project's modulator (``blocks/_modulate.py``); the noise is set from Eb/N0 with
the noise variance per complex sample equal to N0 and Es the energy of one symbol summed over
its samples (the discrete-time AWGN convention, common practice).
"""

from __future__ import annotations

import numpy as np

from blocks._mixer import frequency_shift
from blocks._modulate import SILENT, bits_to_symbols, design_modulator, modulate


def received(modulation: str, symbols: int, sps: float, *, pulse: str = "rect",
             symbol_rate: float = 1000.0, cfo_hz: float = 0.0, ebn0_db: float | None = None,
             clock_ppm: float = 0.0, seed: int = 1, **design):
    """Return ``(samples, sample_rate, codes, modulator)``.

    The transmitter's symbol clock runs ``clock_ppm`` fast; ``ebn0_db=None`` means no noise.
    The pulse tails are flushed with silent symbols.
    """
    rng = np.random.default_rng(seed)
    fs = symbol_rate * sps
    mod = design_modulator(modulation, symbol_rate * (1 + clock_ppm * 1e-6), fs, pulse=pulse,
                           **design)
    bits = rng.integers(0, 2, symbols * mod.bits_per_symbol).astype(np.uint8)
    codes = bits_to_symbols(bits, modulation)
    x, _ = modulate(np.concatenate([codes, np.full(mod.memory, SILENT, np.int8)]), mod)
    x, _ = frequency_shift(x, cfo_hz / fs)
    if ebn0_db is not None:
        es = np.mean(np.abs(x[: int(symbols * sps)]) ** 2) * sps
        n0 = es / mod.bits_per_symbol / 10 ** (ebn0_db / 10)
        noise = rng.standard_normal((2, x.shape[0])) * np.sqrt(n0 / 2)
        x = x + (noise[0] + 1j * noise[1])
    return x.astype(np.complex64), fs, codes, mod
