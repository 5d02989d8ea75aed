"""CURVE encryption and client authorisation for the daemon's sockets.

ZeroMQ's CURVE mechanism (RFC 26/CURVEZMQ, built on Curve25519) encrypts every frame and proves
the server's identity to clients that know its public key. Which clients may connect is decided
by a ZAP handler: here pyzmq's :class:`zmq.auth.thread.ThreadAuthenticator`, which admits the
clients whose public key files sit in one directory.

Key files are ZeroMQ certificate text files (``public-key = "..."`` and ``secret-key = "..."``
lines under ``curve``, the layout pyzmq's ``zmq.auth.load_certificate`` and its
``ThreadAuthenticator`` read), written by :func:`make_keypair` with a comment header of our own
that says where each half goes in a brimline config (:func:`key_file_header`): ``NAME.key``
holds the public key, ``NAME.key_secret`` the public and the secret key; only the latter must be
kept private. The secret file is created with mode 0600 before any key is written to it.

Every key file is read here, by :func:`load_keypair`, and checked before ZeroMQ sees it: a
regular file of at most 64 KiB, a ``public-key`` line, each key exactly 40 characters of the
Z85 alphabet (ZeroMQ RFC 32/Z85) that decode to 32 bytes, and a secret key whose public key
(Curve25519 scalar multiplication, ``zmq.curve_public``) is the one in the file. Anything else
is an :class:`~brimline.daemon.errors.InputError` naming the file and the problem. (A key
ZeroMQ refuses used to raise while a socket was open and unlisted, and ``context.term()``
then waited for that socket for ever: the daemon hung instead of failing.)

In a clients directory, a malformed ``.key`` file is reported by name (a warning, and in
:attr:`CurveServer.client_key_problems`) and skipped; the good keys still admit their clients.
The daemon's own public key is always admitted, so the daemon's in-process follower (the
simulated transmitter) can use the daemon's key pair as its client keys
(:func:`follower_keys`).

:func:`exposed_endpoints` names the endpoints that other hosts can reach while CURVE is off.
"""

from __future__ import annotations

import logging
import os
import stat
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import zmq
from zmq.auth.thread import ThreadAuthenticator

from brimline.daemon.errors import InputError

__all__ = ["KeyPair", "make_keypair", "key_file_header", "load_keypair", "load_public_key",
           "CurveServer", "apply_client", "scan_client_keys", "check_server_keys", "follower_keys",
           "exposed_endpoints", "is_loopback_endpoint"]

log = logging.getLogger("brimline.curve")

_Z85_ALPHABET = ("0123456789abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"
                 ".-:+=^!/*?&<>()[]{}@%$#")  # ZeroMQ RFC 32/Z85
_Z85_VALUE = {c: i for i, c in enumerate(_Z85_ALPHABET)}
_MAX_KEY_FILE_BYTES = 64 * 1024  # a key file is about 300 bytes


@dataclass(frozen=True)
class KeyPair:
    """A CURVE key pair as Z85 text (40 ASCII bytes each); ``secret`` is None for a public file."""

    public: bytes
    secret: bytes | None


def key_file_header(name: str, *, secret: bool) -> str:
    """The comment lines at the top of a key file written by :func:`make_keypair`.

    They say, in this project's terms, where the file goes: the secret half is named by the
    daemon's ``publish.curve_secret_key`` (or given to a client as its own key), the public half
    of a client goes into the folder named by the daemon's ``publish.curve_clients_dir``, the
    daemon's public half goes to its clients. Every line starts with ``#``, so readers skip it.

    Parameters
    ----------
    name : str
        Base name of the pair (``NAME.key``, ``NAME.key_secret``).
    secret : bool
        The header of the secret file (else of the public file).

    Returns
    -------
    str
        Lines ending in a newline.
    """
    if secret:
        lines = [
            f"brimline CURVE key pair {name!r}: SECRET half ({name}.key_secret).",
            "Keep this file on the one machine that uses it, readable by its owner only.",
            f"A daemon: name it in the config, publish.curve_secret_key: {name}.key_secret",
            "(a relative path counts from the config file's folder).",
            "A client (brimline watch, a follower): give it as the client's own key,",
            f"e.g. brimline watch --own-key {name}.key_secret, and put {name}.key into the",
            "folder the daemon's publish.curve_clients_dir names.",
        ]
    else:
        lines = [
            f"brimline CURVE key pair {name!r}: public half ({name}.key). Safe to copy.",
            "A client's public half: copy this file into the folder that the daemon's",
            "publish.curve_clients_dir names; only clients whose .key is there get in",
            "(with no clients folder set, any client that knows the daemon's key gets in).",
            "The daemon's public half: give it to every client as the daemon's key,",
            f"e.g. brimline watch --daemon-key {name}.key.",
        ]
    return "".join(f"# {line}\n" for line in lines) + "#\n"


def _key_file_text(name: str, public: bytes, secret: bytes | None) -> str:
    body = f'curve\n    public-key = "{public.decode("ascii")}"\n'
    if secret is not None:
        body += f'    secret-key = "{secret.decode("ascii")}"\n'
    return key_file_header(name, secret=secret is not None) + body


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

    Notes
    -----
    The pair comes from ``zmq.curve_keypair`` (Curve25519, ZeroMQ RFC 26/CURVEZMQ), written as
    Z85 text (ZeroMQ RFC 32/Z85). Each file starts with :func:`key_file_header`. The secret
    file is opened with ``O_CREAT | O_EXCL`` and mode 0600, so it is never readable by others,
    not even for a moment, and an existing file is never replaced.
    """
    if not name or not all(c.isalnum() or c in "-_." for c in name) or name.startswith("."):
        raise InputError(f"key name {name!r} must be letters, digits, '-', '_' or '.'")
    d = Path(directory)
    public, secret = d / f"{name}.key", d / f"{name}.key_secret"
    for p in (public, secret):
        if p.exists():
            raise InputError(f"{p}: exists already; keys are never overwritten")
    pub_key, sec_key = zmq.curve_keypair()
    try:
        d.mkdir(parents=True, exist_ok=True)
        for path, text, mode in ((secret, _key_file_text(name, pub_key, sec_key), 0o600),
                                 (public, _key_file_text(name, pub_key, None), 0o644)):
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
            with os.fdopen(fd, "w", encoding="ascii") as f:
                f.write(text)
    except FileExistsError as exc:
        raise InputError(f"{exc.filename}: exists already; keys are never overwritten") from None
    except OSError as exc:
        raise InputError(f"{d}: cannot write keys: {exc}") from exc
    return public, secret


def _z85_problem(key: bytes) -> str | None:
    """Why ``key`` is not the Z85 text of a 32-byte CURVE key, or None when it is."""
    try:
        text = key.decode("ascii")
    except UnicodeDecodeError:
        return "is not ASCII text"
    if len(text) != 40:
        return f"has {len(text)} characters, a CURVE key has 40 (Z85 of 32 bytes)"
    bad = sorted({c for c in text if c not in _Z85_VALUE})
    if bad:
        return f"holds characters that are not Z85: {''.join(bad)[:10]!r}"
    for i in range(0, 40, 5):
        value = 0
        for c in text[i:i + 5]:
            value = value * 85 + _Z85_VALUE[c]
        if value >= 1 << 32:
            return f"is not valid Z85 (group {i // 5 + 1} exceeds 32 bits)"
    return None


def _parse_key_text(p: Path, data: bytes) -> tuple[bytes | None, bytes | None]:
    """The ``public-key`` and ``secret-key`` values of a ZeroMQ certificate text."""
    found: dict[bytes, bytes] = {}
    for raw in data.splitlines():
        line = raw.strip()
        if line.startswith(b"#"):
            continue
        for name in (b"public-key", b"secret-key"):
            if line.startswith(name):
                if b"=" not in line:
                    raise InputError(f"{p}: line {line[:40]!r} has no '='")
                if name in found:
                    raise InputError(f"{p}: {name.decode()} appears twice")
                found[name] = line.split(b"=", 1)[1].strip(b" \t'\"")
    return found.get(b"public-key"), found.get(b"secret-key")


def load_keypair(path: str | Path) -> KeyPair:
    """Read and check a key file; a ``.key_secret`` file gives both keys, a ``.key`` file only
    the public one.

    Parameters
    ----------
    path : str or Path
        A key file written by :func:`make_keypair` (or any ZeroMQ certificate file).

    Returns
    -------
    KeyPair

    Raises
    ------
    InputError
        One line naming the file and the problem: missing, unreadable, not a regular file,
        over 64 KiB, no public key, a key that is not 40 Z85 characters (a truncated secret,
        a stray character), or a secret key whose public key is not the one in the file.
        Never hangs: nothing but a regular file is opened.
    """
    p = Path(path)
    try:
        st = p.stat()
        if not stat.S_ISREG(st.st_mode):
            raise InputError(f"{p}: CURVE key is not a regular file")
        if st.st_size > _MAX_KEY_FILE_BYTES:
            raise InputError(f"{p}: {st.st_size} bytes is too large for a CURVE key file")
        with open(p, "rb") as f:
            data = f.read(_MAX_KEY_FILE_BYTES + 1)
    except OSError as exc:
        raise InputError(f"{p}: cannot read CURVE key: {exc.strerror or exc}") from None
    public, secret = _parse_key_text(p, data)
    if public is None:
        raise InputError(f"{p}: no CURVE public key (a 'public-key = \"...\"' line)")
    problem = _z85_problem(public)
    if problem is not None:
        raise InputError(f"{p}: public key {problem}")
    if secret is not None:
        problem = _z85_problem(secret)
        if problem is not None:
            raise InputError(f"{p}: secret key {problem}")
        try:
            derived = zmq.curve_public(secret)
        except zmq.ZMQError as exc:  # libzmq without CURVE
            raise InputError(f"{p}: cannot check the secret key: {exc}") from None
        if derived != public:
            raise InputError(f"{p}: the public key is not the one of the secret key (the "
                             f"two halves come from different key pairs)")
    return KeyPair(public=public, secret=secret)


def load_public_key(path: str | Path) -> bytes:
    """The Z85 public key in ``path`` (a ``.key`` or ``.key_secret`` file), checked."""
    return load_keypair(path).public


def scan_client_keys(clients_dir: str | Path) -> tuple[frozenset[bytes], list[str]]:
    """Read every ``*.key`` file of a clients directory.

    Returns
    -------
    keys : frozenset of bytes
        The Z85 public keys of the good files.
    problems : list of str
        One line per file that cannot be used, naming it and what is wrong.

    Raises
    ------
    InputError
        When the directory is missing or holds no usable key at all.
    """
    cdir = Path(clients_dir)
    if not cdir.is_dir():
        raise InputError(f"{cdir}: CURVE clients directory does not exist")
    keys, problems = set(), []
    files = sorted(cdir.glob("*.key"))
    for f in files:
        try:
            keys.add(load_keypair(f).public)
        except InputError as exc:
            problems.append(str(exc))
    if not keys:
        why = f" ({problems[0]})" if problems else ""
        raise InputError(f"{cdir}: no usable client public keys (*.key) in it{why}")
    return frozenset(keys), problems


def check_server_keys(publish: Any) -> list[str]:
    """Check the key files a ``publish`` config section names, without opening sockets.

    Parameters
    ----------
    publish : PublishSection or object with ``curve_secret_key`` and ``curve_clients_dir``

    Returns
    -------
    list of str
        Warnings: client key files that will be skipped (one line each).

    Raises
    ------
    InputError
        The daemon's secret key file is unusable, or the clients directory is missing or has
        no usable key.
    """
    if publish.curve_secret_key is None:
        return []
    _secret_pair(publish.curve_secret_key)
    if publish.curve_clients_dir is None:
        return []
    return scan_client_keys(publish.curve_clients_dir)[1]


def follower_keys(publish: Any) -> dict[str, str]:
    """Client key arguments of :class:`~brimline.daemon.net.follower.Follower` for the daemon's
    own follower (the simulated transmitter): the daemon's key pair on both sides, which the
    daemon always admits. Empty when CURVE is off.
    """
    if publish.curve_secret_key is None:
        return {}
    return {"curve_server_key": publish.curve_secret_key,
            "curve_client_key": publish.curve_secret_key}


def is_loopback_endpoint(endpoint: str) -> bool:
    """True for an endpoint only this host can reach: ``ipc://``, ``inproc://``, or TCP on
    127.0.0.0/8, ``::1`` or ``localhost``."""
    if not endpoint.startswith("tcp://"):
        return endpoint.startswith(("ipc://", "inproc://"))
    host = endpoint[len("tcp://"):].rsplit(":", 1)[0]
    host = host.split(";")[-1].strip("[]").lower()
    if host in ("localhost", "::1"):
        return True
    parts = host.split(".")
    return len(parts) == 4 and parts[0] == "127" and all(x.isdigit() for x in parts)


def exposed_endpoints(endpoints: Mapping[str, str | None], curve_on: bool) -> list[str]:
    """Warnings for endpoints other hosts can reach while CURVE is off.

    Parameters
    ----------
    endpoints : mapping of str to str or None
        Config key (``publish.map_endpoint``) -> endpoint; None entries are skipped.
    curve_on : bool
        Whether CURVE protects the sockets.

    Returns
    -------
    list of str
        One line per exposed endpoint (wildcard, ``0.0.0.0``, or any non-loopback host).
    """
    if curve_on:
        return []
    return [f"{key}={ep} is reachable from other hosts without CURVE: anyone there can read "
            f"maps and send acknowledgements (set publish.curve_secret_key, or bind 127.0.0.1)"
            for key, ep in endpoints.items() if ep is not None and not is_loopback_endpoint(ep)]


class _AdmitKeys:
    """ZAP credentials provider of pyzmq's authenticator: admits a fixed set of Z85 keys."""

    def __init__(self, keys: frozenset[bytes]) -> None:
        self._keys = keys

    def callback(self, domain: str, key: bytes) -> bool:
        return key in self._keys


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
        knows the server's public key (encryption without client authorisation). A malformed
        file there is logged by name, listed in :attr:`client_key_problems` and skipped.

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
        self.client_key_problems: list[str] = []
        if clients_dir is not None:
            keys, self.client_key_problems = scan_client_keys(clients_dir)
            for problem in self.client_key_problems:
                log.warning("client key skipped: %s", problem)
            self._auth = ThreadAuthenticator(context)
            self._auth.start()
            # The daemon's own key is admitted too: its in-process follower uses it.
            self._auth.configure_curve_callback("*", _AdmitKeys(keys | {self.keypair.public}))

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
