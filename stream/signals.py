"""Stop requests from SIGINT and SIGTERM, caught from the moment the command starts.

The first signal asks for a clean stop (streams end, sinks flush, the summary is printed); a
second one aborts. Handlers are installed before the heavy imports, so a signal that arrives
while the pipeline is still being loaded is remembered and honoured as soon as it runs.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable
from types import FrameType

__all__ = ["StopRequests", "stop_requests"]


class StopRequests:
    """Counts stop signals and forwards them to whoever is running."""

    def __init__(self) -> None:
        self.count = 0
        self.event = threading.Event()
        self._on_stop: Callable[[], None] | None = None
        self._on_abort: Callable[[], None] | None = None

    def install(self) -> None:
        """Catch SIGINT and SIGTERM (call from the main thread)."""
        for sig in (signal.SIGINT, signal.SIGTERM):
            signal.signal(sig, self._handle)

    def _handle(self, signum: int, frame: FrameType | None) -> None:
        self.count += 1
        self.event.set()
        if self.count == 1 and self._on_stop is not None:
            self._on_stop()
        elif self.count > 1 and self._on_abort is not None:
            self._on_abort()

    def attach(self, on_stop: Callable[[], None], on_abort: Callable[[], None]) -> None:
        """Forward future signals to ``on_stop``/``on_abort``; replay one that came already."""
        self._on_stop, self._on_abort = on_stop, on_abort
        if self.count >= 1:
            on_stop()
        if self.count > 1:
            on_abort()

    def detach(self) -> None:
        """Stop forwarding (the run is over)."""
        self._on_stop = self._on_abort = None


#: The process-wide stop requests of the command line.
stop_requests = StopRequests()
