"""phasefree DSP blocks and the kernels beneath them.

Importing this package registers every built-in block kind.
"""

from blocks import basic, detectors, framing, simulator, sinks  # noqa: F401  (registers kinds)
