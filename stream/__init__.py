"""phasefree runtime: chunks, blocks, links, pipelines and the command line."""

from stream.block import Block, Port, Source, StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import BlockFailed, ConfigError, ParamError, PipelineError
from stream.params import Param

__all__ = [
    "Annotation",
    "Block",
    "BlockFailed",
    "Chunk",
    "ConfigError",
    "Param",
    "ParamError",
    "PipelineError",
    "Port",
    "Source",
    "StreamSpec",
]
