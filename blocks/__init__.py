"""phasefree DSP blocks and the kernels beneath them.

Importing this package registers every built-in block kind.
"""

from blocks import (  # noqa: F401  (registers kinds)
    basic,
    conditioning,
    detectors,
    framing,
    meters,
    observe,
    radio,
    recording,
    simulator,
    sinks,
    sync,
)
