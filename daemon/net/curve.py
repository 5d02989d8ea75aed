"""CURVE encryption and client authorisation for the daemon's sockets.

ZeroMQ's CURVE mechanism (RFC 26/CURVEZMQ, built on Curve25519) encrypts every frame and proves
the server's identity to clients that know its public key. Which clients may connect is decided
by a ZAP handler: here pyzmq's :class:`zmq.auth.thread.ThreadAuthenticator`, which admits the
clients whose public key files sit in one directory.

Key files are the usual ZeroMQ certificate text files, written by :func:`make_keypair`
(``NAME.key`` holds the public key, ``NAME.key_secret`` the public and the secret key; only the
latter must be kept private).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator

from brimline.daemon.errors import InputError

__all__ = ["KeyPair", "make_keypair", "load_keypair", "load_public_key", "CurveServer",
           "apply_client"]


@dataclass(frozen=True)
class KeyPair:
    """A CURVE key pair as Z85 text (40 ASCII bytes each); ``secret`` is None for a public file."""

    public: bytes
    secret: bytes | None


def make_keypair(directory: str | Path, name: str = "brimline") -> tuple[Path, Path]:
    """Create ``directory/NAME.key`` (public) and ``directory/NAME.key_secret`` (secret).

    Parameters
    ----------
    directory : str or Path
        Created when missing.
    name : str
        Base file name (letters, digits, ``-``, ``_``, ``.``).

    Returns
    -------
    public_file, secret_file : Path

    Raises
    ------
    InputError
        When ``name`` is unusable, either file exists already (keys are never overwritten) or
        the directory cannot be written.
    """
    if not name or not all(c.isalnum() or c in "-_." for c in name) or name.startswith("."):
        raise InputError(f"key name {name!r} must be letters, digits, '-', '_' or '.'")
    d = Path(directory)
    public, secret = d / f"{name}.key", d / f"{name}.key_secret"
    for p in (public, secret):
        if p.exists():
            raise InputError(f"{p}: exists already; keys are never overwritten")
    try:
        d.mkdir(parents=True, exist_ok=True)
        pub, sec = zmq.auth.create_certificates(str(d), name)
        os.chmod(sec, 0o600)
    except OSError as exc:
        raise InputError(f"{d}: cannot write keys: {exc}") from exc
    return Path(pub), Path(sec)


def load_keypair(path: str | Path) -> KeyPair:
    """Read a key file; a ``.key_secret`` file gives both keys, a ``.key`` file only the public.

    Raises
    ------
    InputError
        When the file is missing, unreadable or holds no public key.
    """
    p = Path(path)
    try:
        public, secret = zmq.auth.load_certificate(p)
    except (OSError, ValueError) as exc:
        raise InputError(f"{p}: cannot read CURVE key: {exc}") from None
    if public is None or len(public) != 40:
        raise InputError(f"{p}: no valid CURVE public key")
    return KeyPair(public=public, secret=secret)


def load_public_key(path: str | Path) -> bytes:
    """The Z85 public key in ``path`` (a ``.key`` or ``.key_secret`` file)."""
    return load_keypair(path).public


def _secret_pair(path: str | Path) -> KeyPair:
    pair = load_keypair(path)
    if pair.secret is None:
        raise InputError(f"{path}: holds no secret key (give the .key_secret file)")
    return pair


class CurveServer:
    """Server side of CURVE for the sockets of one context.

    Parameters
    ----------
    context : zmq.Context
        The context whose sockets this secures (the authenticator serves the whole context).
    secret_key_file : str or Path
        The daemon's ``.key_secret`` file.
    clients_dir : str or Path or None
        Directory of authorised clients' public ``.key`` files. None admits any client that
        knows the server's public key (encryption without client authorisation).

    Notes
    -----
    With ``clients_dir`` set this starts pyzmq's ``ThreadAuthenticator`` (one helper thread that
    answers ZAP requests); :meth:`close` stops it.
    """

    def __init__(self, context: zmq.Context, secret_key_file: str | Path,
                 clients_dir: str | Path | None = None) -> None:
        if not zmq.has("curve"):
            raise InputError("this libzmq has no CURVE support; install pyzmq's wheel or "
                             "turn publish.curve_secret_key off")
        self.keypair = _secret_pair(secret_key_file)
        self.context = context
        self._auth: ThreadAuthenticator | None = None
        if clients_dir is not None:
            cdir = Path(clients_dir)
            if not cdir.is_dir():
                raise InputError(f"{cdir}: CURVE clients directory does not exist")
            if not any(cdir.glob("*.key")):
                raise InputError(f"{cdir}: no client public keys (*.key) in it")
            self._auth = ThreadAuthenticator(context)
            self._auth.start()
            self._auth.configure_curve(domain="*", location=str(cdir))

    @property
    def public_key(self) -> bytes:
        """The server's public key (clients set it as ``curve_serverkey``)."""
        return self.keypair.public

    def apply(self, socket: zmq.Socket) -> None:
        """Make ``socket`` a CURVE server; call before ``bind``."""
        socket.curve_secretkey = self.keypair.secret
        socket.curve_publickey = self.keypair.public
        socket.curve_server = True

    def close(self) -> None:
        """Stop the authenticator thread. Idempotent."""
        if self._auth is not None:
            self._auth.stop()
            self._auth = None


def apply_client(socket: zmq.Socket, *, server_key_file: str | Path,
                 client_secret_file: str | Path) -> None:
    """Make ``socket`` a CURVE client of the server whose public key is in ``server_key_file``.

    Call before ``connect``. ``client_secret_file`` is this client's ``.key_secret`` file; its
    ``.key`` twin must be in the server's clients directory.
    """
    pair = _secret_pair(client_secret_file)
    socket.curve_secretkey = pair.secret
    socket.curve_publickey = pair.public
    socket.curve_serverkey = load_public_key(server_key_file)
