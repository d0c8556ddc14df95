"""Edge security: endpoints and the loopback rule, CURVE key files, socket options, the ZAP allow-list.

The rule (docs/protocol.md section 13): loopback endpoints (127.0.0.0/8, ::1, localhost, ipc://,
inproc://) need nothing; any other endpoint needs CURVE: the service is the CURVE server on every
socket with its own key pair, and a ZAP handler admits exactly the client public keys of an
allow-list. Key files use ZeroMQ's certificate layout so `zmq.auth.load_certificate` reads them.
"""

from __future__ import annotations

import datetime
import ipaddress
import os
from collections.abc import Iterable, Mapping
from pathlib import Path

import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils import z85

from twistrate.solver.errors import ConfigError, field_error

#: ZAP domain of the service's sockets; the authenticator admits clients in this domain only.
ZAP_DOMAIN = "twistrate"
#: Suffixes of key files written by `write_keypair`: public key, and public + secret key.
PUBLIC_SUFFIX = ".key"
SECRET_SUFFIX = ".key_secret"
#: Length of a Z85-encoded 32-byte CURVE key.
Z85_KEY_CHARS = 40
#: File mode of a secret key file.
SECRET_MODE = 0o600
#: Permission bits that refuse a secret key file: group or others may read, write or execute it (the
#: secret would be known beyond its owner; common practice, as for SSH private keys).
OTHERS_MAY_READ = 0o077
PUBLIC_MODE = 0o644
TRANSPORTS: tuple[str, ...] = ("tcp", "ipc", "inproc")


def parse_endpoint(endpoint: str, field_name: str = "endpoint") -> tuple[str, str]:
    """Split a ZeroMQ endpoint into (transport, host or path). Raises ConfigError naming `field_name`.

    Accepted: tcp://HOST:PORT (HOST an IPv4 address, [IPv6], a host name or *; PORT 1-65535, or * for a
    free port the operating system picks when the service binds), ipc://PATH, inproc://NAME.
    """
    accepted = "tcp://HOST:PORT, ipc://PATH or inproc://NAME"
    if not isinstance(endpoint, str) or "://" not in endpoint:
        raise field_error(ConfigError, field_name, endpoint, accepted)
    transport, rest = endpoint.split("://", 1)
    if transport not in TRANSPORTS or not rest:
        raise field_error(ConfigError, field_name, endpoint, accepted)
    if transport != "tcp":
        return transport, rest
    host, sep, port = rest.rpartition(":")
    if not sep or not host or not (port == "*" or (port.isdigit() and 1 <= int(port) <= 65535)):
        raise field_error(ConfigError, field_name, endpoint, "tcp://HOST:PORT with PORT 1-65535 or *")
    if ";" in host:  # "source;destination" form of connect: the destination decides
        host = host.rsplit(";", 1)[1]
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    return transport, host


def is_loopback(endpoint: str, field_name: str = "endpoint") -> bool:
    """True for an endpoint no other machine can reach: 127.0.0.0/8, ::1, localhost, ipc, inproc.

    Raises ConfigError for a malformed endpoint.
    """
    transport, host = parse_endpoint(endpoint, field_name)
    if transport in ("ipc", "inproc"):
        return True
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:  # a host name, an interface name or "*"
        return False


def check_endpoints(endpoints: Mapping[str, str], curve: bool) -> None:
    """Refuse any non-loopback endpoint unless CURVE is configured. endpoints : {key path: endpoint}."""
    for name, endpoint in endpoints.items():
        if not is_loopback(endpoint, name) and not curve:
            raise field_error(ConfigError, name, endpoint,
                              "a loopback endpoint (127.0.0.1, [::1], localhost, ipc://, inproc://); "
                              "or configure [security] server_secret_key and client_public_keys "
                              "(make keys with `twistrate keys`)")


# --- key files ------------------------------------------------------------------------------------


def _key_file_text(kind: str, public: bytes, secret: bytes | None) -> str:
    stamp = datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    lines = [f"#   twistrate CURVE {kind} key, written {stamp} by `twistrate keys`",
             "#   Z85 text; readable by zmq.auth.load_certificate.",
             "#   Keep this file private." if secret else
             "#   Give this file to the peers that must trust it.",
             "", "metadata", "curve", f'    public-key = "{public.decode("ascii")}"']
    if secret is not None:
        lines.append(f'    secret-key = "{secret.decode("ascii")}"')
    return "\n".join(lines) + "\n"


def _write_new(path: Path, text: str, mode: int, force: bool) -> None:
    flags = os.O_WRONLY | os.O_CREAT | (os.O_TRUNC if force else os.O_EXCL)
    fd = os.open(path, flags, mode)
    try:
        os.fchmod(fd, mode)  # the mode argument of open() is filtered by the umask; fix it exactly
        os.write(fd, text.encode("ascii"))
    finally:
        os.close(fd)


def write_keypair(out_dir: str | Path, name: str, force: bool = False) -> tuple[Path, Path]:
    """Make a CURVE key pair and write OUT/NAME.key (public, 0644) and OUT/NAME.key_secret (0600).

    Refuses to overwrite existing files unless force. Returns (public path, secret path).
    """
    if not name or "/" in name or os.sep in name or name.startswith("."):
        raise field_error(ConfigError, "name", name, "a plain file name (no path separators, not hidden)")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    public_path, secret_path = out / f"{name}{PUBLIC_SUFFIX}", out / f"{name}{SECRET_SUFFIX}"
    if not force:
        for path in (public_path, secret_path):
            if path.exists():
                raise field_error(ConfigError, "out", str(path),
                                  "a file that does not exist yet (or --force)")
    public, secret = zmq.curve_keypair()
    _write_new(secret_path, _key_file_text("secret", public, secret), SECRET_MODE, force)
    _write_new(public_path, _key_file_text("public", public, None), PUBLIC_MODE, force)
    return public_path, secret_path


def _check_key(key: bytes | None, field_name: str, path: Path) -> bytes:
    if key is None or len(key) != Z85_KEY_CHARS:
        raise field_error(ConfigError, field_name, str(path), f"a key file with a {Z85_KEY_CHARS}-character "
                          "Z85 key (written by `twistrate keys`)")
    try:
        z85.decode(key)
    except (ValueError, KeyError, TypeError):
        raise field_error(ConfigError, field_name, str(path), "a valid Z85 key") from None
    return key


def load_secret_keypair(path: str | Path,
                        field_name: str = "security.server_secret_key") -> tuple[bytes, bytes]:
    """(public, secret) Z85 keys from a secret key file. Raises ConfigError naming `field_name`."""
    path = Path(path)
    try:
        mode = path.stat().st_mode
        public, secret = zmq.auth.load_certificate(path)
    except (OSError, ValueError):
        raise field_error(ConfigError, field_name, str(path),
                          "a readable secret key file (NAME.key_secret from `twistrate keys`)") from None
    if secret is None:
        raise field_error(ConfigError, field_name, str(path),
                          "the secret key file NAME.key_secret, not the public NAME.key")
    if mode & OTHERS_MAY_READ:
        raise field_error(ConfigError, field_name, str(path),
                          f"a secret key file only its owner may read or write (it has mode "
                          f"{mode & 0o777:04o}: chmod 600)")
    return _check_key(public, field_name, path), _check_key(secret, field_name, path)


def load_public_key(path: str | Path, field_name: str = "public key") -> bytes:
    """The Z85 public key of a key file (public or secret). Raises ConfigError naming `field_name`."""
    path = Path(path)
    try:
        public, _ = zmq.auth.load_certificate(path)
    except (OSError, ValueError):
        raise field_error(ConfigError, field_name, str(path),
                          "a readable public key file (NAME.key from `twistrate keys`)") from None
    return _check_key(public, field_name, path)


def load_allow_list(paths: Iterable[str | Path],
                    field_name: str = "security.client_public_keys") -> frozenset[bytes]:
    """The Z85 client public keys admitted: each path is a public key file or a directory whose
    `*.key` files are read. Raises ConfigError naming the entry; an empty result is an error."""
    keys: set[bytes] = set()
    for i, entry in enumerate(paths):
        name = f"{field_name}[{i}]"
        path = Path(entry)
        if path.is_dir():
            files = sorted(path.glob(f"*{PUBLIC_SUFFIX}"))
            if not files:
                raise field_error(ConfigError, name, str(path), f"a directory holding *{PUBLIC_SUFFIX} files")
            keys.update(load_public_key(f, name) for f in files)
        else:
            keys.add(load_public_key(path, name))
    if not keys:
        raise field_error(ConfigError, field_name, [], "at least one client public key file or directory")
    return frozenset(keys)


# --- sockets ----------------------------------------------------------------------------------------


def apply_curve_server(sock: zmq.Socket, public: bytes, secret: bytes) -> None:
    """Make `sock` a CURVE server in the ZAP domain ZAP_DOMAIN. Call before bind()."""
    sock.curve_secretkey = secret
    sock.curve_publickey = public
    sock.zap_domain = ZAP_DOMAIN.encode()
    sock.curve_server = True


def apply_curve_client(sock: zmq.Socket, server_public: bytes, public: bytes, secret: bytes) -> None:
    """Make `sock` a CURVE client of the server with public key `server_public`. Call before connect()."""
    sock.curve_serverkey = server_public
    sock.curve_publickey = public
    sock.curve_secretkey = secret


class _AllowList:
    """ZAP credentials provider admitting exactly a set of Z85 client public keys."""

    def __init__(self, allowed: frozenset[bytes]) -> None:
        self.allowed = allowed

    def callback(self, domain: str, key: bytes) -> bool:
        return domain == ZAP_DOMAIN and key in self.allowed


def start_authenticator(context: zmq.Context, allowed: frozenset[bytes]) -> ThreadAuthenticator:
    """Start a ZAP handler (its own thread) admitting exactly `allowed` (Z85 public keys) in ZAP_DOMAIN.

    Start it before binding any CURVE server socket of `context` (without a ZAP handler, libzmq
    admits any client that knows the server key). Stop it with `.stop()` after closing the sockets.
    """
    if not allowed:
        raise field_error(ConfigError, "security.client_public_keys", [], "at least one client public key")
    auth = ThreadAuthenticator(context)
    auth.start()
    auth.configure_curve_callback(ZAP_DOMAIN, credentials_provider=_AllowList(frozenset(allowed)))
    return auth
