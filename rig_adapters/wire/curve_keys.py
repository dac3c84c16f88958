"""CurveZMQ key files and the CURVE role of a socket, for authenticated links.

A key pair is two small TOML files, written by ``placeloop keys NAME``:

``NAME.key`` (the secret half; mode 0600, never copied to another machine)::

    [placeloop_curve_key]
    format = 1
    name = "decoder"
    public = "<40 Z85 characters>"
    secret = "<40 Z85 characters>"

``NAME.pub`` (the public half; given to the peers that must know this side)::

    [placeloop_curve_key]
    format = 1
    name = "decoder"
    public = "<40 Z85 characters>"

Z85 is the ZeroMQ text encoding of the 32-byte Curve25519 keys (ZeroMQ RFC
32). placeloop's loop is the CURVE server on each authenticated socket, its
own ``.key`` named in ``[endpoints] curve_secret_key``; every peer (rig
publisher, stimulator, monitor, control client) is a CURVE client with a key
pair of its own and a copy of the loop's ``.pub``, and the loop admits only
the peers whose ``.pub`` sits in ``[endpoints] curve_clients``.
"""

from __future__ import annotations

import os
import re
import stat
import tomllib
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.utils.z85

#: The one table of a key file.
KEY_TABLE = "placeloop_curve_key"

#: The key-file format written here; a reader refuses any other.
KEY_FORMAT = 1

SECRET_SUFFIX = ".key"
PUBLIC_SUFFIX = ".pub"

#: Names that make safe file names on every system.
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")

#: A Curve25519 key in Z85: 32 bytes as 40 characters.
_Z85_KEY_CHARS = 40


class KeyFileError(ValueError):
    """A key file or directory that cannot be used; the message says how to fix it."""


@dataclass(frozen=True)
class CurveKey:
    """One side's key: its name, its public key and, from a ``.key`` file, its secret key (Z85 bytes)."""

    name: str
    public: bytes
    secret: bytes | None = None


def check_key_name(name: str) -> str:
    """``name`` if it can name a key pair's files; otherwise a KeyFileError saying what can."""
    if not isinstance(name, str) or not _NAME.match(name):
        raise KeyFileError(f"a key name is 1-64 letters, digits, '_', '.' or '-', starting with a letter or digit; "
                           f"got {name!r}")
    return name


def write_key_pair(directory: str | Path, name: str) -> tuple[Path, Path]:
    """Make a new key pair and write ``NAME.key`` (mode 0600) and ``NAME.pub`` in ``directory``.

    Existing files are never overwritten: a key that peers already trust is
    replaced only by deleting it first, deliberately.

    Returns
    -------
    (secret_path, public_path) : tuple of Path
    """
    check_key_name(name)
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    public, secret = zmq.curve_keypair()
    secret_path = directory / (name + SECRET_SUFFIX)
    public_path = directory / (name + PUBLIC_SUFFIX)
    for path in (secret_path, public_path):
        if path.exists():
            raise KeyFileError(f"{path} already exists; delete it first if this key is to be replaced "
                               "(every peer that trusts it then needs the new .pub)")
    head = f"[{KEY_TABLE}]\nformat = {KEY_FORMAT}\nname = \"{name}\"\npublic = \"{public.decode()}\"\n"
    # Created 0600 from the start: the secret is never readable by others, not even for a moment.
    fd = os.open(secret_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w", encoding="ascii") as fh:
        fh.write("# placeloop CurveZMQ key: the SECRET half. Keep it on this machine, mode 0600.\n"
                 + head + f"secret = \"{secret.decode()}\"\n")
    fd = os.open(public_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    with os.fdopen(fd, "w", encoding="ascii") as fh:
        fh.write("# placeloop CurveZMQ key: the public half. Give it to the peers that must know this side.\n"
                 + head)
    return secret_path, public_path


def read_key(path: str | Path, need_secret: bool = False) -> CurveKey:
    """Read a ``.key`` or ``.pub`` file.

    Parameters
    ----------
    path : str or Path
    need_secret : bool
        Require the secret half (a ``.key`` file, readable by its owner only).

    Raises
    ------
    KeyFileError
        Unreadable, not a placeloop key file, a malformed key, a missing
        secret, or a secret file that others can read.
    """
    path = Path(path)
    try:
        info = path.stat()
        if not stat.S_ISREG(info.st_mode):
            raise KeyFileError(f"key file {path} is not a regular file")
        doc = tomllib.loads(path.read_text(encoding="ascii"))
    except OSError as exc:
        raise KeyFileError(f"cannot read key file {path}: {exc.strerror}; make one with `placeloop keys`") from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise KeyFileError(f"{path} is not a placeloop key file ({exc}); make one with `placeloop keys`") from None
    table = doc.get(KEY_TABLE)
    if not isinstance(table, dict) or table.get("format") != KEY_FORMAT:
        raise KeyFileError(f"{path} is not a placeloop key file of format {KEY_FORMAT} (no [{KEY_TABLE}] table with "
                           f"format = {KEY_FORMAT}); make one with `placeloop keys`")
    name = table.get("name")
    if not isinstance(name, str):
        raise KeyFileError(f"{path}: name must be a string, got {name!r}")
    public = _z85_key(path, "public", table.get("public"))
    secret = table.get("secret")
    if secret is not None:
        secret = _z85_key(path, "secret", secret)
        if os.name == "posix" and info.st_mode & 0o077:
            raise KeyFileError(f"secret key file {path} can be read by others (mode {stat.S_IMODE(info.st_mode):o}); "
                               f"run `chmod 600 {path}`, and make a new key pair if others may have copied it")
        if zmq.curve_public(secret) != public:
            raise KeyFileError(f"{path}: the public key is not the one of its secret key; the file was edited, "
                               "make a new key pair with `placeloop keys`")
    elif need_secret:
        raise KeyFileError(f"{path} holds no secret key; name the {SECRET_SUFFIX} file written by `placeloop keys`, "
                           f"not its {PUBLIC_SUFFIX}")
    return CurveKey(name, public, secret)


def _z85_key(path: Path, field: str, value) -> bytes:
    if not isinstance(value, str) or len(value) != _Z85_KEY_CHARS:
        raise KeyFileError(f"{path}: {field} must be a {_Z85_KEY_CHARS}-character Z85 key, got {value!r:.60}")
    try:
        zmq.utils.z85.decode(value.encode("ascii"))
    except (ValueError, KeyError, IndexError):
        raise KeyFileError(f"{path}: {field} is not Z85 text (ZeroMQ RFC 32)") from None
    return value.encode("ascii")


def read_authorised(directory: str | Path) -> dict[bytes, str]:
    """The public keys of the peers allowed in: every ``*.pub`` file of ``directory``, key → name.

    Raises
    ------
    KeyFileError
        The directory is missing or holds no ``.pub`` file, or a file in it is
        not a key file.
    """
    directory = Path(directory)
    if not directory.is_dir():
        raise KeyFileError(f"the authorised-clients directory {directory} does not exist; make it and copy each "
                           f"peer's {PUBLIC_SUFFIX} file into it")
    keys: dict[bytes, str] = {}
    for path in sorted(directory.glob("*" + PUBLIC_SUFFIX)):
        key = read_key(path)
        keys[key.public] = key.name
    if not keys:
        raise KeyFileError(f"{directory} holds no {PUBLIC_SUFFIX} file, so no peer could connect; copy each "
                           f"peer's {PUBLIC_SUFFIX} file (from `placeloop keys`) into it")
    return keys


def as_server(sock: zmq.Socket, own: CurveKey, domain: str) -> None:
    """Make ``sock`` the CURVE server of its links, its peers checked in ZAP ``domain``.

    Must be called before the socket binds or connects.
    """
    sock.curve_server = True
    sock.curve_secretkey = own.secret
    sock.curve_publickey = own.public
    sock.zap_domain = domain.encode()


def as_client(sock: zmq.Socket, own: CurveKey, server_public: bytes) -> None:
    """Make ``sock`` a CURVE client of the server whose public key is ``server_public``.

    Must be called before the socket binds or connects.
    """
    sock.curve_secretkey = own.secret
    sock.curve_publickey = own.public
    sock.curve_serverkey = server_public


def client_of(sock: zmq.Socket, own_key_path: str | Path, server_key_path: str | Path) -> None:
    """:func:`as_client` from files: this side's ``.key`` and the server's ``.pub``."""
    as_client(sock, read_key(own_key_path, need_secret=True), read_key(server_key_path).public)
