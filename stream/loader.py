"""Pipeline files: TOML in, a validated ``Pipeline`` out, every error located by key path.

Layout (see DESIGN.md)::

    [pipeline]
    name = "orchard-frost-2fsk"
    sample_rate = 250_000            # default for sources that do not set their own
    symbol_rate = 9_600              # default for blocks that take a symbol_rate
    links = ["src -> det -> ber", "det.soft ~> eye"]   # "->" lossless link, "~>" tap

    [blocks.src]
    kind = "sim"
    ...

In a chain ``a -> b.p -> c`` a port written on a middle block names the output that leaves it;
the chain enters the block on its only input. Name an input port on the last block of a chain.

Running in parts (several processes or hosts)
---------------------------------------------
``[parts]`` names which blocks run together in one process; every link that joins two parts
gets a ``[crossings."SRC -> DST"]`` table (the link as written in ``links``, ports optional)
saying how it travels::

    [parts]
    board = ["src", "dec"]
    host = ["cfo", "timing", "det", "ber"]

    [crossings."dec -> cfo"]
    address = "tcp://127.0.0.1:5571"      # or "ipc://PATH"
    binds = "receiver"                    # which end binds (default); or "sender"
    listener_public = "keys/host.key"     # the binding end's public key, for the connecting end
    listener_secret = "keys/host.key_secret"
    dialer_secret = "keys/board.key_secret"
    admit = ["keys/board.key"]            # connecting ends the binding end accepts

``phasefree run FILE --part board`` runs the board's blocks; with no ``--part`` a file runs the
parts it declares itself (all of them in one process, crossings as in-process links, when the
file declares every part). The whole graph is validated first, so dtype and rate are checked
across each crossing. A TCP crossing must stay on the loopback interface unless it says
``allow_remote = true``, and is encrypted and authenticated with CURVE unless it says
``curve = false`` (:mod:`stream.parts` has the rules). Key file paths are relative to the
working folder.

``include = ["other.toml"]`` in ``[pipeline]`` (paths relative to the including file) adds the
blocks, links, parts and crossings of other files: a receiver split over two machines can be
two files, one per part, each including the other, so whichever is run sees the whole graph
but runs only its own part. Each file's blocks take the defaults of their own ``[pipeline]``.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from stream import registry
from stream.cpus import OBSERVER_POLICIES, CpuSettingError, parse_cpus
from stream.errors import ParamError, PipelineError
from stream.graph import Pipeline, parse_endpoint
from stream.params import Param
from stream.parts import check_layout, parse_layout

__all__ = ["PIPELINE_KEYS", "load_pipeline", "parse_override", "pipeline_from_dict"]

#: Keys allowed in the ``[pipeline]`` table, with what they mean.
PIPELINE_KEYS = {
    "name": "name shown in status and summary",
    "description": "one paragraph on what the pipeline is for",
    "sample_rate": "default sample_rate (Hz) of sources that do not set one",
    "symbol_rate": "default symbol_rate (symbols/s) of blocks that take one",
    "links": "list of chains 'a -> b -> c' ('~>' makes a lossy tap)",
    "queue_depth": "chunks a link holds before it applies backpressure",
    "cpus": "cores of the block threads: 'auto' (one core per process), 'all', or a list",
    "observers": "priority of the blocks behind taps: 'background' (below the receive path) "
                 "or 'equal'",
    "include": "other pipeline files whose blocks, links, parts and crossings join this one",
}
#: Top-level tables of a pipeline file.
TABLES = ("pipeline", "blocks", "parts", "crossings")
# where an included file's table came from (not a TOML key: TOML keys cannot hold a NUL)
_SOURCE = "\0file"
_QUEUE_DEPTH = Param("queue_depth", int, 8, low=1, high=1 << 16)
_OBSERVERS = Param("observers", str, OBSERVER_POLICIES[0], choices=OBSERVER_POLICIES)
#: Keys of ``[pipeline]`` handed down to blocks that declare a parameter of the same name.
INHERITED = ("sample_rate", "symbol_rate")

_ARROW = re.compile(r"\s*(->|~>)\s*")
_ID = re.compile(r"^[A-Za-z_][A-Za-z0-9_-]*$")


def parse_override(text: str) -> tuple[str, str, Any]:
    """Parse ``--set id.param=value`` into ``(id, param, value)``.

    The value is read as a TOML value (numbers, booleans, quoted strings, lists); anything
    that is not valid TOML is taken as a bare string, so ``--set src.modulation=ook`` works.
    """
    target, sep, raw = text.partition("=")
    block_id, _, param = target.strip().partition(".")
    if not sep or not block_id or not param:
        raise PipelineError("--set", f"expected id.param=value (got {text!r})")
    raw = raw.strip()
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except ValueError:  # TOMLDecodeError, or an integer beyond Python's conversion limit
        value = raw
    return block_id, param.strip(), value


def load_pipeline(path: str | Path, overrides: Sequence[str] = ()) -> Pipeline:
    """Read, override and validate a pipeline file.

    Parameters
    ----------
    path : str or Path
        The TOML pipeline file.
    overrides : sequence of str
        ``id.param=value`` strings (``pipeline.key=value`` for the pipeline table).

    Returns
    -------
    Pipeline
        Validated and configured, ready to run.

    Raises
    ------
    PipelineError
        ``str(err)`` reads ``FILE: key.path: message``.
    """
    name = str(path)
    docs: list[dict[str, Any]] = []
    _read_with_includes(Path(path), docs, set())
    for doc in docs[1:]:  # an included file's own mistakes are reported against it
        try:
            _head(doc)
        except PipelineError as err:
            raise err.in_file(doc[_SOURCE]) from None
    try:
        return _assemble(docs, overrides)
    except PipelineError as err:
        raise err.in_file(name) from None


def _read_doc(path: Path) -> dict[str, Any]:
    name = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PipelineError("", "no such pipeline file", name) from None
    except (OSError, UnicodeDecodeError) as err:
        raise PipelineError("", f"cannot read: {err}", name) from None
    try:
        return tomllib.loads(text)
    except ValueError as err:  # TOMLDecodeError, or an integer beyond Python's conversion limit
        raise PipelineError("", f"not valid TOML: {err}", name) from None


def _read_with_includes(path: Path, docs: list[dict[str, Any]], seen: set[Path]) -> None:
    """Append the file's table and those it includes (each file once, so files may include
    each other)."""
    seen.add(path.resolve())
    doc = _read_doc(path)
    docs.append(doc)
    if docs[0] is not doc:
        doc = dict(doc)
        docs[-1] = doc
        doc[_SOURCE] = str(path)
    head = doc.get("pipeline", {})
    include = head.get("include", []) if isinstance(head, dict) else []
    if not isinstance(include, list) or not all(isinstance(i, str) for i in include):
        raise PipelineError("pipeline.include", "must be a list of pipeline file paths",
                            str(path))
    for other in include:
        target = path.parent / other
        if target.resolve() not in seen:
            _read_with_includes(target, docs, seen)


def _apply_overrides(docs: list[dict[str, Any]], overrides: Sequence[str]) -> None:
    blocks: dict[str, Any] = {}
    for doc in reversed(docs):  # a block defined twice is reported later; the first file wins
        if isinstance(doc.get("blocks"), dict):
            blocks.update(doc["blocks"])
    for text in overrides:
        block_id, param, value = parse_override(text)
        if block_id == "pipeline":
            table = docs[0].setdefault("pipeline", {})
        elif block_id not in blocks:
            known = ", ".join(blocks) or "none"
            raise PipelineError(f"--set {block_id}.{param}",
                                f"unknown block {block_id!r} (blocks: {known})")
        else:
            table = blocks[block_id]
        where = "pipeline" if block_id == "pipeline" else f"blocks.{block_id}"
        *path, key = param.split(".")  # src.fallback_params.ebn0_db reaches a sub-table
        for name in path:
            if not isinstance(table, dict):
                raise PipelineError(where, "must be a table")
            inner = table.get(name, {})
            if not isinstance(inner, dict):
                raise PipelineError(f"{where}.{name}", f"is not a table (got {inner!r})")
            table[name] = dict(inner)  # copied, so the caller's parsed file is left as it was
            table, where = table[name], f"{where}.{name}"
        if not isinstance(table, dict):
            raise PipelineError(where, "must be a table")
        table[key] = value


def pipeline_from_dict(doc: dict[str, Any], overrides: Sequence[str] = ()) -> Pipeline:
    """Build and validate a pipeline from an already-parsed pipeline file (see module doc)."""
    return _assemble([doc], overrides)


def _copy(doc: dict[str, Any]) -> dict[str, Any]:
    doc = {k: (dict(v) if isinstance(v, dict) else v) for k, v in doc.items() if k != _SOURCE}
    if isinstance(doc.get("blocks"), dict):
        doc["blocks"] = {k: (dict(v) if isinstance(v, dict) else v)
                         for k, v in doc["blocks"].items()}
    return doc


def _head(doc: dict[str, Any]) -> dict[str, Any]:
    for key in doc:
        if key not in TABLES and key != _SOURCE:
            raise PipelineError(key, "unknown table (expected [pipeline], [blocks.ID], "
                                "[parts] and [crossings])")
    head = doc.get("pipeline", {})
    if not isinstance(head, dict):
        raise PipelineError("pipeline", "must be a table")
    for key in head:
        if key not in PIPELINE_KEYS:
            raise PipelineError(f"pipeline.{key}",
                                f"unknown key (known: {', '.join(PIPELINE_KEYS)})")
    return head


def _assemble(docs: list[dict[str, Any]], overrides: Sequence[str]) -> Pipeline:
    """Build one validated pipeline from a file (``docs[0]``) and the files it includes."""
    docs = [_copy(d) for d in docs]
    _apply_overrides(docs, overrides)
    heads = [_head(d) for d in docs]
    head = heads[0]
    try:
        depth = _QUEUE_DEPTH.check(head.get("queue_depth", _QUEUE_DEPTH.default))
    except ParamError as err:
        raise PipelineError(f"pipeline.{err.name}", err.message) from None
    try:
        cpus = parse_cpus(head.get("cpus", "auto"))
    except CpuSettingError as err:
        raise PipelineError("pipeline.cpus", str(err)) from None
    try:
        observers = _OBSERVERS.check(head.get("observers", _OBSERVERS.default))
    except ParamError as err:
        raise PipelineError(f"pipeline.{err.name}", err.message) from None
    pipe = Pipeline(str(head.get("name", "pipeline")), queue_depth=depth, cpus=cpus,
                    observers=observers)
    for doc, own_head in zip(docs, heads, strict=True):
        inherited = _inherited(own_head)
        blocks = doc.get("blocks")
        if not isinstance(blocks, dict) or not blocks:
            raise PipelineError("blocks",
                                "no blocks defined (add tables [blocks.ID] with a kind)")
        for block_id, table in blocks.items():
            pipe.add(_make_block(block_id, table, inherited))
    chains = []
    for own_head in heads:
        links = own_head.get("links", [] if len(docs) > 1 else None)
        if not isinstance(links, list) or (len(docs) == 1 and not links):
            raise PipelineError("pipeline.links", "must be a non-empty list of 'a -> b' chains")
        chains.extend(links)
    if not chains:
        raise PipelineError("pipeline.links", "must be a non-empty list of 'a -> b' chains")
    for i, chain in enumerate(chains):
        _add_chain(pipe, chain, f"pipeline.links[{i}]")
    pipe.validate()
    _lay_out(pipe, docs)
    return pipe


def _merged(docs: list[dict[str, Any]], table: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for doc in docs:
        part = doc.get(table, {})
        if not isinstance(part, dict):
            raise PipelineError(table, "must be a table")
        for key, value in part.items():
            if key in out:
                raise PipelineError(f"{table}.{key}", "is defined twice")
            out[key] = value
    return out


def _lay_out(pipe: Pipeline, docs: list[dict[str, Any]]) -> None:
    """Read ``[parts]`` and ``[crossings]`` over all files and check them against the graph."""
    parts, crossings = _merged(docs, "parts"), _merged(docs, "crossings")
    if not parts:
        if crossings:
            raise PipelineError("crossings", "crossings join parts: add a [parts] table")
        return
    own = docs[0].get("parts", {})
    layout = parse_layout(parts, crossings, own if own else parts)
    check_layout(pipe, layout)
    pipe.layout = layout


def _inherited(head: Mapping[str, Any]) -> dict[str, Any]:
    out = {}
    for key in INHERITED:
        if key in head:
            value = head[key]
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
                raise PipelineError(f"pipeline.{key}", f"must be a number > 0 (got {value!r})")
            out[key] = value
    return out


def _make_block(block_id: str, table: Any, inherited: Mapping[str, Any]):
    key = f"blocks.{block_id}"
    if not _ID.match(block_id):
        raise PipelineError(key, "block ids are letters, digits, '_' and '-', not starting "
                            "with a digit")
    if not isinstance(table, dict):
        raise PipelineError(key, "must be a table with a kind")
    params = dict(table)
    kind = params.pop("kind", None)
    if kind is None:
        raise PipelineError(f"{key}.kind", "is required (see 'phasefree blocks')")
    cls = registry.lookup(kind) if isinstance(kind, str) else None
    if cls is None:
        known = ", ".join(registry.kinds())
        raise PipelineError(f"{key}.kind", f"unknown kind {kind!r} (kinds: {known})")
    declared = {p.name for p in cls.params}
    for name, value in inherited.items():
        if name in declared and name not in params:
            params[name] = value
    try:
        return cls(block_id, **params)
    except ParamError as err:
        raise PipelineError(f"{key}.{err.name}", err.message) from None


def _add_chain(pipe: Pipeline, chain: Any, key: str) -> None:
    if not isinstance(chain, str):
        raise PipelineError(key, f"must be a string like 'a -> b' (got {chain!r})")
    parts = _ARROW.split(chain.strip())
    if len(parts) < 3 or any(not p for p in parts[::2]):
        raise PipelineError(key, f"expected 'a -> b [-> c ...]' (got {chain!r})")
    nodes, arrows = parts[::2], parts[1::2]
    for node in nodes:
        block_id, port = parse_endpoint(node)
        if not _ID.match(block_id) or (port is not None and not _ID.match(port)):
            raise PipelineError(key, f"bad endpoint {node!r} (write id or id.port)")
    for i, arrow in enumerate(arrows):
        # a middle node's port names the output leaving it; it is entered on its only input
        last = i + 1 == len(nodes) - 1
        dst = nodes[i + 1] if last else parse_endpoint(nodes[i + 1])[0]
        pipe.connect(nodes[i], dst, tap=arrow == "~>", key=key)
