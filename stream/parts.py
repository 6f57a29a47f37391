"""Parts of a pipeline: which blocks run in which process, and how the links between them travel.

A pipeline file may divide its blocks into named *parts* (``[parts]``) and give every link that
joins two parts a *crossing* (``[crossings."a -> b"]``): an ``ipc://`` or ``tcp://`` address,
which end binds, and for TCP the CURVE key files. The whole graph is always validated (so dtype
and rate are checked across every crossing); a process then runs only the blocks of its parts,
and each crossing whose two ends run in different processes becomes a network link.

Rules that keep a receiver safe by default:

- the receiving end binds, unless the crossing says ``binds = "sender"``;
- a TCP address must be on the loopback interface (``127.0.0.1``, ``::1``, ``localhost``)
  unless the crossing says ``allow_remote = true`` (a warning is logged when it runs);
- a TCP crossing is encrypted and authenticated with CURVE and needs its key files, unless it
  says ``curve = false`` (a warning is logged when it runs); IPC crossings need no keys.
"""

from __future__ import annotations

import ipaddress
import logging
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from stream.curve import KeyFileError, KeyPair, load_public, load_secret
from stream.errors import PipelineError
from stream.graph import Edge, Pipeline, parse_endpoint

__all__ = ["CROSSING_KEYS", "Crossing", "CrossingKeys", "Layout", "PartPlan", "check_layout",
           "choose_parts", "parse_layout", "plan_part"]

log = logging.getLogger("phasefree.parts")

#: Keys allowed in a ``[crossings."a -> b"]`` table, with what they mean.
CROSSING_KEYS = {
    "address": "ipc://PATH or tcp://HOST:PORT the link travels over",
    "binds": "which end binds the address: 'receiver' (default) or 'sender'",
    "allow_remote": "allow a tcp address beyond the loopback interface (default false)",
    "curve": "encrypt and authenticate with CURVE (default: true for tcp, false for ipc)",
    "listener_public": "public key file (.key) of the binding end, read by the connecting end",
    "listener_secret": "key pair file (.key_secret) of the binding end",
    "dialer_secret": "key pair file (.key_secret) of the connecting end",
    "admit": "public key files (.key) of the connecting ends the binding end accepts",
}
_SIDES = ("receiver", "sender")
_TCP = re.compile(r"^tcp://(?P<host>\[[0-9A-Fa-f:.]+\]|[^:/\[\]]+):(?P<port>[0-9]{1,5})$")
_LOOPBACK_NAMES = ("localhost",)


@dataclass(frozen=True)
class CrossingKeys:
    """The CURVE keys one end of a crossing uses (only the files its role needs are read)."""

    own: KeyPair
    listener_public: bytes | None = None      # connecting end: the binding end's public key
    admitted: tuple[KeyPair, ...] = ()         # binding end: the client keys it accepts


@dataclass(frozen=True)
class Crossing:
    """How one link between two parts travels.

    ``key`` locates the table in the pipeline file (``crossings.dec -> cfo``).
    """

    key: str
    src: str
    src_port: str | None
    dst: str
    dst_port: str | None
    address: str
    binds: str = "receiver"
    curve: bool = False
    allow_remote: bool = False
    key_files: Mapping[str, Any] = field(default_factory=dict)

    @property
    def scheme(self) -> str:
        """``"tcp"`` or ``"ipc"``."""
        return self.address.partition("://")[0]

    def binds_here(self, side: str) -> bool:
        """Whether the end on ``side`` (``"sender"`` or ``"receiver"``) binds."""
        return side == self.binds

    def matches(self, edge: Edge) -> bool:
        """Whether this crossing describes ``edge`` (ports may be left out when unambiguous)."""
        return (edge.src == self.src and edge.dst == self.dst
                and self.src_port in (None, edge.src_port)
                and self.dst_port in (None, edge.dst_port))

    def load_keys(self, side: str) -> CrossingKeys | None:
        """Read the key files the end on ``side`` needs (None without CURVE).

        Raises
        ------
        PipelineError
            Naming the key and the file when one is missing or wrong.
        """
        if not self.curve:
            return None
        binding = self.binds_here(side)
        needed = ("listener_secret", "admit") if binding else ("dialer_secret",
                                                                "listener_public")
        for name in needed:
            if name not in self.key_files:
                raise PipelineError(f"{self.key}.{name}",
                                    f"is required for the {'binding' if binding else 'connecting'}"
                                    f" end of a CURVE crossing")
        try:
            if binding:
                own = load_secret(Path(self.key_files["listener_secret"]))
                admitted = tuple(load_public(Path(p)) for p in self.key_files["admit"])
                return CrossingKeys(own, admitted=admitted)
            own = load_secret(Path(self.key_files["dialer_secret"]))
            server = load_public(Path(self.key_files["listener_public"]))
            return CrossingKeys(own, listener_public=server.public)
        except KeyFileError as err:
            which = next(n for n in needed
                         if err.path in _paths(self.key_files[n]))
            raise PipelineError(f"{self.key}.{which}", str(err)) from None


def _paths(value: Any) -> list[Path]:
    return [Path(v) for v in value] if isinstance(value, list) else [Path(value)]


@dataclass(frozen=True)
class Layout:
    """The parts of a pipeline and its crossings.

    ``home`` lists the parts declared by the file named on the command line: what runs when
    no ``--part`` is given.
    """

    parts: Mapping[str, tuple[str, ...]]
    crossings: tuple[Crossing, ...]
    home: tuple[str, ...]

    def part_of(self, block_id: str) -> str:
        """The part a block belongs to."""
        return next(name for name, ids in self.parts.items() if block_id in ids)


@dataclass(frozen=True)
class PartPlan:
    """What one process runs: its blocks, and each crossing whose other end runs elsewhere.

    ``network`` holds ``(edge, crossing, side, keys)`` with ``side`` the local end:
    ``"sender"`` (the link's source block runs here) or ``"receiver"``, and ``keys`` the CURVE
    keys that end uses (None without CURVE).
    """

    names: tuple[str, ...]
    blocks: frozenset[str]
    network: tuple[tuple[Edge, Crossing, str, CrossingKeys | None], ...]


# ----------------------------------------------------------------------------------------------
# reading the tables


def parse_layout(parts: Any, crossings: Any, home: Iterable[str]) -> Layout:
    """Read the ``[parts]`` and ``[crossings]`` tables (already merged over included files).

    Parameters
    ----------
    parts : dict
        Part name -> list of block ids.
    crossings : dict
        Link text (``"a -> b"``) -> table of :data:`CROSSING_KEYS`.
    home : iterable of str
        Part names declared by the file named on the command line.
    """
    if not isinstance(parts, dict) or not parts:
        raise PipelineError("parts", "must be a table of part name = [block ids]")
    table: dict[str, tuple[str, ...]] = {}
    for name, ids in parts.items():
        if not isinstance(ids, list) or not ids or not all(isinstance(i, str) for i in ids):
            raise PipelineError(f"parts.{name}", f"must be a non-empty list of block ids "
                                f"(got {ids!r:.60})")
        table[name] = tuple(ids)
    if not isinstance(crossings, dict):
        raise PipelineError("crossings", "must be a table of \"a -> b\" = {address = ...}")
    read = tuple(_crossing(text, spec) for text, spec in crossings.items())
    seen: dict[str, str] = {}
    for c in read:
        if c.address in seen:
            raise PipelineError(f"{c.key}.address", f"{c.address} is already the address of "
                                f"{seen[c.address]}")
        seen[c.address] = c.key
    return Layout(table, read, tuple(home))


def _crossing(text: str, spec: Any) -> Crossing:
    key = f"crossings.{text}"
    ends = [p.strip() for p in text.split("->")]
    if len(ends) != 2 or not all(ends):
        raise PipelineError(key, "name one link as 'a -> b' (ports optional: 'a.out -> b.in')")
    if not isinstance(spec, dict):
        raise PipelineError(key, "must be a table with an address")
    for name in spec:
        if name not in CROSSING_KEYS:
            raise PipelineError(f"{key}.{name}",
                                f"unknown key (known: {', '.join(CROSSING_KEYS)})")
    address = spec.get("address")
    if not isinstance(address, str):
        raise PipelineError(f"{key}.address", "is required: 'ipc://PATH' or 'tcp://HOST:PORT'")
    binds = spec.get("binds", "receiver")
    if binds not in _SIDES:
        raise PipelineError(f"{key}.binds", f"must be 'receiver' or 'sender' (got {binds!r})")
    for flag in ("allow_remote", "curve"):
        if flag in spec and not isinstance(spec[flag], bool):
            raise PipelineError(f"{key}.{flag}", f"must be true or false (got {spec[flag]!r})")
    allow_remote = spec.get("allow_remote", False)
    scheme = address.partition("://")[0]
    if scheme == "tcp":
        _check_tcp(key, address, allow_remote)
        curve = spec.get("curve", True)
    elif scheme == "ipc":
        if not address[len("ipc://"):]:
            raise PipelineError(f"{key}.address", "an ipc address names a path (ipc://PATH)")
        curve = spec.get("curve", False)
    else:
        raise PipelineError(f"{key}.address",
                            f"must start with ipc:// or tcp:// (got {address!r})")
    files = {}
    for name in ("listener_public", "listener_secret", "dialer_secret"):
        if name in spec:
            if not isinstance(spec[name], str) or not spec[name]:
                raise PipelineError(f"{key}.{name}", "must be a key file path")
            files[name] = spec[name]
    if "admit" in spec:
        admit = spec["admit"]
        if (not isinstance(admit, list) or not admit
                or not all(isinstance(p, str) and p for p in admit)):
            raise PipelineError(f"{key}.admit", "must be a non-empty list of .key file paths")
        files["admit"] = list(admit)
    if curve and not files:
        raise PipelineError(key, "a CURVE crossing names its key files (listener_public, "
                            "listener_secret, dialer_secret, admit), or says curve = false")
    src, src_port = parse_endpoint(ends[0])
    dst, dst_port = parse_endpoint(ends[1])
    return Crossing(key, src, src_port, dst, dst_port, address, binds, curve, allow_remote,
                    files)


def _check_tcp(key: str, address: str, allow_remote: bool) -> None:
    match = _TCP.match(address)
    if match is None:
        raise PipelineError(f"{key}.address", f"expected tcp://HOST:PORT (got {address!r})")
    port = int(match["port"])
    if not 0 < port < 65536:
        raise PipelineError(f"{key}.address", f"port must be 1..65535 (got {port})")
    if not (_is_loopback(match["host"]) or allow_remote):
        raise PipelineError(f"{key}.address",
                            f"{match['host']} is beyond the loopback interface: write "
                            "allow_remote = true to let the link reach other hosts")


def _is_loopback(host: str) -> bool:
    if host in _LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


# ----------------------------------------------------------------------------------------------
# checking against the graph, choosing what runs


def check_layout(pipe: Pipeline, layout: Layout) -> None:
    """Check a layout against a validated graph: every block in one part, every link that joins
    two parts has a crossing, every crossing names a link that joins two parts."""
    owner: dict[str, str] = {}
    for name, ids in layout.parts.items():
        for bid in ids:
            if bid not in pipe.blocks:
                raise PipelineError(f"parts.{name}", f"unknown block {bid!r} "
                                    f"(blocks: {', '.join(pipe.blocks)})")
            if bid in owner:
                raise PipelineError(f"parts.{name}", f"block {bid!r} is already in part "
                                    f"{owner[bid]!r}")
            owner[bid] = name
    missing = [bid for bid in pipe.blocks if bid not in owner]
    if missing:
        raise PipelineError("parts", f"blocks in no part: {', '.join(missing)}")
    for c in layout.crossings:
        edges = [e for e in pipe.edges if c.matches(e)]
        if len(edges) != 1:
            raise PipelineError(c.key, "names no link of the pipeline" if not edges else
                                "matches several links: name the ports")
        edge = edges[0]
        if owner[edge.src] == owner[edge.dst]:
            raise PipelineError(c.key, f"link {edge.label()} stays inside part "
                                f"{owner[edge.src]!r}: it needs no crossing")
        if edge.tap:
            raise PipelineError(c.key, f"{edge.label()} is a tap; only lossless links "
                                "('->') cross parts")
    for edge in pipe.edges:
        if owner[edge.src] != owner[edge.dst] and _crossing_of(layout, edge) is None:
            raise PipelineError(edge.key, f"link {edge.label()} joins parts "
                                f"{owner[edge.src]!r} and {owner[edge.dst]!r}: give it an "
                                f"address in [crossings.\"{edge.src} -> {edge.dst}\"]")


def _crossing_of(layout: Layout, edge: Edge) -> Crossing | None:
    return next((c for c in layout.crossings if c.matches(edge)), None)


def plan_part(pipe: Pipeline, layout: Layout, names: Iterable[str]) -> PartPlan:
    """Choose the blocks of parts ``names`` and the crossings that leave them.

    The key files of those crossings are read here, so a missing key stops the command before
    anything runs.

    Raises
    ------
    PipelineError
        For an unknown part name (``--part``) or a missing or wrong key file.
    """
    names = tuple(names)
    for name in names:
        if name not in layout.parts:
            raise PipelineError("--part", f"unknown part {name!r} "
                                f"(parts: {', '.join(layout.parts)})")
    blocks = frozenset(bid for name in names for bid in layout.parts[name])
    network = []
    for edge in pipe.edges:
        here_src, here_dst = edge.src in blocks, edge.dst in blocks
        if here_src != here_dst:
            crossing = _crossing_of(layout, edge)
            assert crossing is not None  # check_layout saw to it
            side = "sender" if here_src else "receiver"
            network.append((edge, crossing, side, crossing.load_keys(side)))
    return PartPlan(names, blocks, tuple(network))


def choose_parts(pipe: Pipeline, names: str | None) -> PartPlan | None:
    """The plan for ``--part NAME[,NAME]`` (None: the file's own parts, or no layout at all).

    Raises
    ------
    PipelineError
        For ``--part`` on an undivided pipeline, an unknown part, or a missing key file.
    """
    layout: Layout | None = pipe.layout
    if layout is None:
        if names:
            raise PipelineError("--part", "the pipeline is not divided into parts "
                                "(give it a [parts] table)")
        return None
    chosen = [n.strip() for n in names.split(",")] if names else list(layout.home)
    return plan_part(pipe, layout, chosen)
