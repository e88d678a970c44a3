"""CurveZMQ key files (CurveZMQ, RFC 26) and the client side of a CURVE connection.

Key files are pyzmq's certificate format (``zmq.auth.create_certificates``): ``NAME.key`` holds
the public key and may be copied anywhere; ``NAME.key_secret`` holds both keys and stays with its
owner (written readable by its owner only). A server needs its own ``.key_secret`` and a folder
of its clients' ``.key`` files; a client needs its own ``.key_secret`` and the server's ``.key``.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth
from rigcast.runtime.errors import EXIT_USAGE, RigcastError
from rigcast.runtime.serve.config import ConfigError

log = logging.getLogger(__name__)


class KeyFileError(ConfigError, RigcastError):
    """A key file or folder is missing or unreadable; the message names it."""

    advice = "create keys with `rigcast keys`, or give the folder that holds them"
    exit_code = EXIT_USAGE


def create_key_pair(folder: Path, name: str) -> tuple[Path, Path]:
    """Write ``folder/name.key`` (public) and ``folder/name.key_secret`` (secret, mode 0600).

    Refuses to overwrite an existing pair. Returns (public file, secret file)."""
    if not name or "/" in name or "\\" in name or name.startswith("."):
        raise KeyFileError(f"key name {name!r} must be a plain file name")
    folder = Path(folder)
    public, secret = folder / f"{name}.key", folder / f"{name}.key_secret"
    for path in (public, secret):
        if path.exists():
            raise KeyFileError(f"{path} exists; pick another name or remove it first")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        old = os.umask(0o077)
        try:
            made_public, made_secret = zmq.auth.create_certificates(folder, name)
        finally:
            os.umask(old)
        os.chmod(made_secret, 0o600)
        os.chmod(made_public, 0o644)
    except OSError as exc:
        raise KeyFileError(f"cannot write keys in {folder}: {exc.strerror}") from None
    return Path(made_public), Path(made_secret)


def _load(path: Path, *, secret: bool) -> tuple[bytes, bytes | None]:
    path = Path(path)
    if not path.is_file():
        raise KeyFileError(f"key file {path} does not exist")
    try:
        public, secret_key = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise KeyFileError(f"{path} is not a key file from `rigcast keys` ({exc})") from None
    if public is None or len(public) != 40:
        raise KeyFileError(f"{path} holds no valid public key")
    if secret and (secret_key is None or len(secret_key) != 40):
        raise KeyFileError(f"{path} holds no secret key; give the .key_secret file")
    return public, secret_key


def load_secret_key(path: Path) -> tuple[bytes, bytes]:
    """(public, secret) Z85 keys from a ``.key_secret`` file; KeyFileError naming the file."""
    public, secret = _load(path, secret=True)
    assert secret is not None
    return public, secret


def load_public_key(path: Path) -> bytes:
    """The Z85 public key of a ``.key`` (or ``.key_secret``) file."""
    return _load(path, secret=False)[0]


def public_key_count(folder: Path) -> int:
    """How many public key files a folder of authorised keys holds; KeyFileError if no folder."""
    folder = Path(folder)
    if not folder.is_dir():
        raise KeyFileError(f"authorized keys folder {folder} does not exist")
    return sum(1 for p in folder.glob("*.key") if p.is_file())


@dataclass(frozen=True)
class ClientCurve:
    """What a client needs for CURVE: the server's public key and its own key pair (Z85)."""

    server_public: bytes
    public: bytes
    secret: bytes

    @classmethod
    def from_files(cls, server_key: Path, client_key: Path) -> ClientCurve:
        public, secret = load_secret_key(client_key)
        return cls(load_public_key(server_key), public, secret)

    def apply(self, sock: zmq.Socket) -> None:
        """Set the CURVE client options; call before connect."""
        sock.setsockopt(zmq.CURVE_SERVERKEY, self.server_public)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)


def client_curve(server_key: Path | None, client_key: Path | None) -> ClientCurve | None:
    """ClientCurve from the two options, None when neither is given; both or neither."""
    if server_key is None and client_key is None:
        return None
    if server_key is None or client_key is None:
        raise KeyFileError("CURVE needs both the server's public key (--server-key) and this "
                        "client's secret key (--client-key)")
    return ClientCurve.from_files(server_key, client_key)
