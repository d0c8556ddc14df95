"""Edge security: the loopback rule, key files, and CURVE with a ZAP allow-list on real loopback sockets.

External references: RFC 1122, 3.2.1.3 (127.0.0.0/8 is the loopback network); RFC 4291, 2.5.3
(::1 is the IPv6 loopback address); ZeroMQ RFC 26/CurveZMQ and RFC 27/ZAP (handshake refused for
a client key the ZAP handler denies); libzmq's zmq_curve_public (derives the public key from the
secret key; used as the independent check that a written pair belongs together).
"""

from __future__ import annotations

import os
import stat
import threading

import pytest
import zmq
import zmq.auth
from zmq.utils import z85

from twistrate.service import security
from twistrate.service.commands import keys as keys_cmd
from twistrate.solver.errors import ConfigError

LOOPBACK = ["tcp://127.0.0.1:47310", "tcp://127.8.9.10:5", "tcp://[::1]:47311", "tcp://localhost:1",
            "ipc:///tmp/twistrate.sock", "inproc://tick"]
NOT_LOOPBACK = ["tcp://0.0.0.0:47310", "tcp://*:47310", "tcp://10.1.2.3:5", "tcp://192.168.0.7:5",
                "tcp://[::]:5", "tcp://[fe80::1]:5", "tcp://eth0:5", "tcp://robot.example:5",
                "tcp://128.0.0.1:5", "tcp://127.0.0.1;10.0.0.2:5"]


@pytest.mark.parametrize("endpoint", LOOPBACK)
def test_loopback_endpoints(endpoint):
    assert security.is_loopback(endpoint)
    security.check_endpoints({"endpoints.x": endpoint}, curve=False)


@pytest.mark.parametrize("endpoint", NOT_LOOPBACK)
def test_other_endpoints_need_curve(endpoint):
    assert not security.is_loopback(endpoint)
    with pytest.raises(ConfigError, match=r"endpoints\.intake.*twistrate keys"):
        security.check_endpoints({"endpoints.intake": endpoint}, curve=False)
    security.check_endpoints({"endpoints.intake": endpoint}, curve=True)


@pytest.mark.parametrize("endpoint", ["127.0.0.1:5", "tcp://127.0.0.1", "tcp://127.0.0.1:0",
                                      "tcp://127.0.0.1:65536", "pgm://eth0;239.1.1.1:5", "tcp://:5", ""])
def test_malformed_endpoints_name_the_field(endpoint):
    with pytest.raises(ConfigError, match=r"^endpoints\.control: got"):
        security.is_loopback(endpoint, "endpoints.control")


# --- key files -------------------------------------------------------------------------------------------


def test_write_keypair_modes_format_and_pairing(tmp_path):
    public_path, secret_path = security.write_keypair(tmp_path / "k", "svc")
    assert stat.S_IMODE(os.stat(secret_path).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(public_path).st_mode) == 0o644
    public, secret = zmq.auth.load_certificate(secret_path)
    public_only, none = zmq.auth.load_certificate(public_path)
    assert none is None and public_only == public
    assert len(z85.decode(public)) == len(z85.decode(secret)) == 32
    assert zmq.curve_public(secret) == public  # libzmq derives the same public key from the secret
    assert security.load_secret_keypair(secret_path) == (public, secret)
    assert security.load_public_key(public_path) == public


def test_write_keypair_refuses_to_overwrite_unless_forced(tmp_path):
    _, secret_path = security.write_keypair(tmp_path, "svc")
    first = secret_path.read_bytes()
    with pytest.raises(ConfigError, match=r"svc\.key"):
        security.write_keypair(tmp_path, "svc")
    assert secret_path.read_bytes() == first
    security.write_keypair(tmp_path, "svc", force=True)
    assert secret_path.read_bytes() != first
    assert stat.S_IMODE(os.stat(secret_path).st_mode) == 0o600


@pytest.mark.parametrize("name", ["", "a/b", ".hidden"])
def test_write_keypair_refuses_odd_names(tmp_path, name):
    with pytest.raises(ConfigError, match="name"):
        security.write_keypair(tmp_path, name)


def test_keys_command(tmp_path, capsys):
    assert keys_cmd.main(["--out", str(tmp_path), "--name", "pad"]) == 0
    assert (tmp_path / "pad.key").exists() and (tmp_path / "pad.key_secret").exists()
    assert "pad.key_secret" in capsys.readouterr().out
    assert keys_cmd.main(["--out", str(tmp_path), "--name", "pad"]) == 1
    assert "--force" in capsys.readouterr().err
    assert keys_cmd.main(["--out", str(tmp_path), "--name", "pad", "--force"]) == 0


def test_key_loading_errors(tmp_path):
    public_path, _ = security.write_keypair(tmp_path, "svc")
    with pytest.raises(ConfigError, match="key_secret"):
        security.load_secret_keypair(public_path)
    with pytest.raises(ConfigError, match="readable"):
        security.load_secret_keypair(tmp_path / "absent.key_secret")
    bad = tmp_path / "bad.key"
    bad.write_text('curve\n    public-key = "short"\n')
    with pytest.raises(ConfigError, match="40-character"):
        security.load_public_key(bad, "x")


def test_allow_list_from_files_and_directories(tmp_path):
    a, _ = security.write_keypair(tmp_path / "clients", "a")
    b, _ = security.write_keypair(tmp_path / "clients", "b")
    c, _ = security.write_keypair(tmp_path / "other", "c")
    keys = security.load_allow_list([tmp_path / "clients", c])
    assert keys == {security.load_public_key(p) for p in (a, b, c)}
    (tmp_path / "empty").mkdir()
    with pytest.raises(ConfigError, match=r"client_public_keys\[0\]"):
        security.load_allow_list([tmp_path / "empty"])
    with pytest.raises(ConfigError, match="at least one"):
        security.load_allow_list([])


# --- CURVE on real loopback sockets ----------------------------------------------------------------------


def _ask(ctx: zmq.Context, endpoint: str, server_public: bytes, pair: tuple[bytes, bytes] | None,
         timeout_ms: int = 1000) -> bytes | None:
    """One request over a REQ socket (CURVE client when `pair` is given); None when no reply arrives."""
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    if pair is not None:
        security.apply_curve_client(sock, server_public, *pair)
    sock.connect(endpoint)
    try:
        sock.send(b"ping")
        if sock.poll(timeout_ms, zmq.POLLIN):
            return sock.recv()
        return None
    finally:
        sock.close(linger=0)


def test_curve_server_admits_only_the_allow_list(tmp_path):
    _, server_secret = security.write_keypair(tmp_path, "service")
    _, known_secret = security.write_keypair(tmp_path / "clients", "known")
    _, unknown_secret = security.write_keypair(tmp_path / "strangers", "unknown")
    server_pair = security.load_secret_keypair(server_secret)
    allowed = security.load_allow_list([tmp_path / "clients"])
    ctx = zmq.Context()
    auth = security.start_authenticator(ctx, allowed)
    server = ctx.socket(zmq.REP)
    server.setsockopt(zmq.LINGER, 0)
    security.apply_curve_server(server, *server_pair)
    port = server.bind_to_random_port("tcp://127.0.0.1")
    endpoint = f"tcp://127.0.0.1:{port}"
    replies: list[bytes] = []
    stop = threading.Event()

    def loop() -> None:
        while not stop.is_set():
            if server.poll(50, zmq.POLLIN):
                replies.append(server.recv())
                server.send(b"pong")

    try:
        thread = threading.Thread(target=loop, daemon=True)
        thread.start()
        known = zmq.auth.load_certificate(known_secret)
        unknown = zmq.auth.load_certificate(unknown_secret)
        assert _ask(ctx, endpoint, server_pair[0], known) == b"pong"
        assert _ask(ctx, endpoint, server_pair[0], unknown, timeout_ms=500) is None     # ZAP denies
        assert _ask(ctx, endpoint, server_pair[0], None, timeout_ms=500) is None        # no CURVE at all
        wrong_server = zmq.curve_keypair()[0]
        assert _ask(ctx, endpoint, wrong_server, known, timeout_ms=500) is None        # wrong server key
        assert _ask(ctx, endpoint, server_pair[0], known) == b"pong"                   # still serving
        stop.set()
        thread.join(2)
        assert replies == [b"ping", b"ping"]
    finally:
        server.close(linger=0)
        auth.stop()
        ctx.term()


def test_start_authenticator_refuses_an_empty_allow_list():
    ctx = zmq.Context()
    try:
        with pytest.raises(ConfigError, match="client_public_keys"):
            security.start_authenticator(ctx, frozenset())
    finally:
        ctx.term()
