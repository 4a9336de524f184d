"""Reading CURVE key files (``zmq.auth`` certificates made by ``watchtower keys``) on either side.

Checked here, before ZeroMQ sees a key, so a wrong file reads as a sentence rather than an errno.
"""

from __future__ import annotations

from pathlib import Path

import zmq.auth
import zmq.utils.z85


class KeyFileError(ValueError):
    """A key file we cannot use; the message is one line for the user."""


def read_key_file(path: str | Path) -> tuple[bytes, bytes | None]:
    """(public key, secret key or None) of a key file, both Z85 text of a 32-byte key."""
    try:
        public, secret = zmq.auth.load_certificate(path)
    except (OSError, ValueError):
        raise KeyFileError(f"{path} is not a readable key file (made by 'watchtower keys')") from None
    for key in (public, secret):
        if key is not None and not is_z85_key(key):
            raise KeyFileError(f"{path} holds a malformed key")
    return public, secret


def is_z85_key(key: bytes) -> bool:
    try:
        return len(key) == 40 and len(zmq.utils.z85.decode(key)) == 32
    except (ValueError, KeyError):  # z85 raises KeyError on a character outside its alphabet
        return False


def curve_keys(secret_file: str | Path, server_file: str | Path) -> tuple[bytes, bytes, bytes]:
    """(own public, own secret, collector public): what a probe or daemon needs to connect with keys."""
    public, secret = read_key_file(secret_file)
    if secret is None:
        raise KeyFileError(f"{secret_file} holds no secret key (give the agent's .key_secret file)")
    server, _ = read_key_file(server_file)
    return public, secret, server
