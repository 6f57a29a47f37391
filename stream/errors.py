"""The runtime's exceptions: a small, precise set.

Configuration problems (a parameter, a pipeline file, a graph) are found before anything runs and
end the command with exit status 2. A block that fails while running ends the run with status 3.
Links distinguish a link closed by us, a peer that has gone, and the end of a stream.
"""

from __future__ import annotations

__all__ = [
    "BlockFailed",
    "ConfigError",
    "EndOfStream",
    "LinkClosed",
    "ParamError",
    "PeerGone",
    "PipelineError",
]


class ConfigError(ValueError):
    """Base of every problem found before a pipeline runs (exit status 2)."""


class ParamError(ConfigError):
    """A block parameter is missing, unknown, of the wrong type or out of range.

    Parameters
    ----------
    name : str
        The parameter's name as written in a pipeline file.
    message : str
        What is wrong, e.g. ``"must be > 0 (got -5)"``.
    """

    def __init__(self, name: str, message: str) -> None:
        super().__init__(f"{name}: {message}")
        self.name = name
        self.message = message


class PipelineError(ConfigError):
    """A problem in a pipeline, located by file and key path.

    ``str(err)`` reads ``FILE: key.path: message``, the form every pipeline-file error takes.
    """

    def __init__(self, key: str, message: str, file: str | None = None) -> None:
        self.key = key
        self.message = message
        self.file = file
        where = f"{file}: " if file else ""
        super().__init__(f"{where}{key}: {message}" if key else f"{where}{message}")

    def in_file(self, file: str) -> PipelineError:
        """Return the same error attributed to ``file``."""
        return PipelineError(self.key, self.message, file)


class BlockFailed(RuntimeError):
    """A block raised while running; the pipeline stopped (exit status 3)."""

    def __init__(self, block_id: str, error: BaseException) -> None:
        super().__init__(f"block {block_id!r} failed: {type(error).__name__}: {error}")
        self.block_id = block_id
        self.error = error


class LinkClosed(RuntimeError):
    """The link was closed on this side (the run is stopping)."""


class PeerGone(RuntimeError):
    """The far end of a link went away without ending its stream."""


class EndOfStream(Exception):
    """The upstream block ended its stream; no more chunks will arrive."""
