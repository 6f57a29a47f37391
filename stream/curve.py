"""CURVE keys for links between hosts: writing key pairs, reading them, admitting listed peers.

ZeroMQ's CURVE mechanism (RFC 26/CurveZMQ, built on the Curve25519 elliptic-curve key exchange)
encrypts a TCP connection and authenticates both ends. The end that binds is the CURVE
*server*: it holds its own key pair, and a ZAP handler (RFC 27/ZAP, here pyzmq's
``zmq.auth.thread.ThreadAuthenticator``) decides for each connecting *client* whether its public
key is on the list the pipeline file names. The connecting end holds its own key pair and the
server's public key, so it also knows it is talking to the right server.

Key files are the ones ``zmq.auth.create_certificates`` writes: ``NAME.key`` holds the public
key, ``NAME.key_secret`` the public and the secret key (both Z85 text). Only ``.key`` files ever
leave the machine that made them.
"""

from __future__ import annotations

import logging
import os
import threading
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator

__all__ = ["KeyFileError", "KeyPair", "PeerGuard", "load_public", "load_secret", "write_key_pairs"]

log = logging.getLogger("phasefree.curve")

_PUBLIC_SUFFIX = ".key"
_SECRET_SUFFIX = ".key_secret"


class KeyFileError(ValueError):
    """A key file that is missing or does not hold the key it should."""

    def __init__(self, path: Path, message: str) -> None:
        super().__init__(f"{path}: {message}")
        self.path = path
        self.message = message


@dataclass(frozen=True)
class KeyPair:
    """A CURVE key pair, Z85-encoded (40 characters each); ``secret`` is None for a public key."""

    public: bytes
    secret: bytes | None = None


def write_key_pairs(folder: Path, names: Iterable[str], force: bool = False) -> list[Path]:
    """Write one CURVE key pair per name into ``folder`` (created if needed).

    Parameters
    ----------
    folder : Path
        Where ``NAME.key`` and ``NAME.key_secret`` go.
    names : iterable of str
        One pair per name.
    force : bool
        Replace existing files; otherwise an existing file is an error and nothing is written.

    Returns
    -------
    list of Path
        The files written, public before secret for each name.

    Raises
    ------
    FileExistsError
        If a file would be replaced and ``force`` is false.
    """
    names = list(names)
    targets = [folder / f"{name}{suffix}" for name in names
               for suffix in (_PUBLIC_SUFFIX, _SECRET_SUFFIX)]
    existing = [str(t) for t in targets if t.exists()]
    if existing and not force:
        raise FileExistsError(f"would replace {', '.join(existing)} (use --force)")
    folder.mkdir(parents=True, exist_ok=True)
    for name in names:
        _, secret = zmq.auth.create_certificates(str(folder), name)
        os.chmod(secret, 0o600)  # a secret key is for its owner's eyes only (common practice)
    return targets


def _read(path: Path) -> tuple[bytes, bytes | None]:
    if not path.is_file():
        raise KeyFileError(path, "no such key file (write key pairs with 'phasefree keygen DIR')")
    try:
        public, secret = zmq.auth.load_certificate(str(path))
    except (ValueError, OSError, UnicodeDecodeError) as err:
        raise KeyFileError(path, f"not a key file ({err})") from None
    if public is None or len(public) != 40:
        raise KeyFileError(path, "holds no CURVE public key")
    return public, secret


def load_public(path: Path) -> KeyPair:
    """Read the public key of a ``.key`` (or ``.key_secret``) file."""
    public, _ = _read(path)
    return KeyPair(public)


def load_secret(path: Path) -> KeyPair:
    """Read a key pair from a ``.key_secret`` file."""
    public, secret = _read(path)
    if secret is None or len(secret) != 40:
        raise KeyFileError(path, "holds no secret key (name the .key_secret file)")
    return KeyPair(public, secret)


class PeerGuard:
    """The ZAP handler of one ZeroMQ context: admits only listed client keys, per domain.

    Each binding CURVE socket sets its ``ZAP_DOMAIN`` to the label of its link, so a refusal
    is counted against the right link. Refusals are logged with the refused public key.

    Parameters
    ----------
    ctx : zmq.Context
        The context whose sockets the guard serves.
    """

    def __init__(self, ctx: zmq.Context) -> None:
        self._auth = ThreadAuthenticator(ctx, log=logging.getLogger("phasefree.curve.zap"))
        self._lock = threading.Lock()
        self._admitted: dict[str, frozenset[bytes]] = {}
        self._on_refusal: dict[str, Callable[[bytes], None]] = {}
        self._started = False

    def admit(self, domain: str, keys: Iterable[KeyPair],
              on_refusal: Callable[[bytes], None]) -> None:
        """Admit ``keys`` on ``domain``; call ``on_refusal(key)`` for any other client key."""
        with self._lock:
            self._admitted[domain] = frozenset(k.public for k in keys)
            self._on_refusal[domain] = on_refusal
        if not self._started:
            self._auth.start()
            self._started = True
        self._auth.configure_curve_callback(domain, credentials_provider=self)

    def callback(self, domain: str, key: bytes) -> bool:
        """ZAP decision for one connecting client (called by the authenticator's thread)."""
        with self._lock:
            allowed = key in self._admitted.get(domain, frozenset())
            refused = self._on_refusal.get(domain)
        if not allowed:
            log.warning("link %s: refused a peer whose key %s is not admitted",
                        domain, key.decode("ascii", "replace"))
            if refused is not None:
                refused(key)
        return allowed

    def stop(self) -> None:
        """Stop the handler thread (before the context is destroyed)."""
        if self._started:
            self._auth.stop()
            self._started = False

    def __repr__(self) -> str:
        return f"<PeerGuard domains={sorted(self._admitted)}>"
