"""``phasefree keygen``: CURVE key pairs that ZeroMQ reads, kept private, never overwritten."""

from __future__ import annotations

import stat

import pytest
import zmq
import zmq.auth

from stream.cli import main
from stream.curve import KeyFileError, load_public, load_secret


def test_keygen_writes_a_public_and_a_private_file_per_name(tmp_path, capsys):
    folder = tmp_path / "keys"
    assert main(["keygen", str(folder)]) == 0
    names = sorted(p.name for p in folder.iterdir())
    assert names == ["board.key", "board.key_secret", "host.key", "host.key_secret"]
    for name in ("host", "board"):
        secret = folder / f"{name}.key_secret"
        assert stat.S_IMODE(secret.stat().st_mode) == 0o600  # owner only (common practice)
        pair = load_secret(secret)
        # the public file and the secret file hold the same public key, as pyzmq reads them
        assert pair.public == load_public(folder / f"{name}.key").public
        assert zmq.auth.load_certificate(str(secret)) == (pair.public, pair.secret)
        # a CURVE secret key determines its public key (Curve25519): libzmq derives the same
        assert zmq.curve_public(pair.secret) == pair.public
    assert load_secret(folder / "host.key_secret") != load_secret(folder / "board.key_secret")
    assert str(folder / "host.key") in capsys.readouterr().out


def test_keygen_refuses_to_replace_keys_unless_forced(tmp_path, capsys):
    folder = tmp_path / "k"
    assert main(["keygen", str(folder), "gateway"]) == 0
    before = (folder / "gateway.key_secret").read_bytes()
    assert main(["keygen", str(folder), "gateway"]) == 2
    assert "would replace" in capsys.readouterr().err
    assert (folder / "gateway.key_secret").read_bytes() == before
    assert main(["keygen", str(folder), "gateway", "--force"]) == 0
    assert (folder / "gateway.key_secret").read_bytes() != before
    assert main(["keygen", str(folder), "../escape"]) == 2


def test_a_public_key_file_is_not_a_key_pair(tmp_path):
    assert main(["keygen", str(tmp_path)]) == 0
    with pytest.raises(KeyFileError, match="no secret key"):
        load_secret(tmp_path / "host.key")
    with pytest.raises(KeyFileError, match="no such key file"):
        load_public(tmp_path / "missing.key")
    (tmp_path / "junk.key").write_text("not a certificate\n")
    with pytest.raises(KeyFileError):
        load_public(tmp_path / "junk.key")
