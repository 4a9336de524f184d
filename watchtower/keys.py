"""CURVE keys: the head's key pair, one key pair per agent, and the allow-list the collector checks.

A key folder (``watchtower keys init DIR``) holds::

    DIR/head.key             the head's public key: copy it to every node (``--server-key``)
    DIR/head.key_secret      the head's secret key: stays on the head node (0600)
    DIR/agents/NAME.key      agents' public keys: the allow-list; remove a file to refuse that agent
    DIR/secrets/NAME.key_secret  agents' secret keys (folder 0700): copy one to its node, then delete it here

Keys are made and read with ``zmq.auth`` (ZeroMQ's certificate files). The allow-list is re-read whenever
its folder changes, so adding or removing an agent needs no collector restart; connections already
made stay up until they drop.
"""

from __future__ import annotations

import os
import re
import threading
from dataclasses import dataclass
from pathlib import Path

import zmq.auth

from agent.keys import KeyFileError, read_key_file
from watchtower.errors import UsageError

HEAD = "head"
AGENTS = "agents"
SECRETS = "secrets"
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


class KeysError(UsageError):
    """A key folder or key file we cannot use; the message is one line for the user."""


@dataclass(frozen=True)
class HeadKeys:
    """What a collector needs to run CURVE: its secret key and the allow-list folder."""

    public: bytes
    secret: bytes
    agents: Path


@dataclass(frozen=True)
class AgentKeyFiles:
    public: Path
    secret: Path


def init_keys(folder: Path) -> tuple[Path, Path]:
    """Make the head's key pair and the allow-list folders; returns (public file, secret file)."""
    public, secret = folder / f"{HEAD}.key", folder / f"{HEAD}.key_secret"
    if secret.exists():
        raise KeysError(f"{folder} already holds a head key pair; not replacing it (agents trust it)")
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        (folder / AGENTS).mkdir(exist_ok=True)
        (folder / SECRETS).mkdir(mode=0o700, exist_ok=True)
        os.chmod(folder / SECRETS, 0o700)
        zmq.auth.create_certificates(folder, HEAD)
        os.chmod(secret, 0o600)
    except OSError as exc:
        raise KeysError(f"cannot make keys in {folder}: {exc.strerror}") from None
    return public, secret


def new_agent(name: str, folder: Path) -> AgentKeyFiles:
    """Make an agent's key pair: its public key joins the allow-list, its secret waits in ``secrets/``."""
    if not _NAME.match(name):
        raise KeysError(f"bad agent name {name!r}: 1-64 letters, digits, '.', '_' or '-', not starting with one "
                        "of the last three")
    if not (folder / f"{HEAD}.key").is_file() or not (folder / AGENTS).is_dir():
        raise KeysError(f"{folder} is not a key folder; make one with 'watchtower keys init {folder}'")
    files = AgentKeyFiles(folder / AGENTS / f"{name}.key", folder / SECRETS / f"{name}.key_secret")
    if files.public.exists() or files.secret.exists():
        raise KeysError(f"an agent named {name!r} already has keys in {folder}")
    try:
        (folder / SECRETS).mkdir(mode=0o700, exist_ok=True)
        os.chmod(folder / SECRETS, 0o700)  # the secret is never readable by others, not even briefly
        made_public, made_secret = zmq.auth.create_certificates(folder / SECRETS, name)
        os.chmod(Path(made_secret), 0o600)
        os.replace(made_public, files.public)
    except OSError as exc:
        raise KeysError(f"cannot make keys in {folder}: {exc.strerror}") from None
    return files


def load_head(folder: Path) -> HeadKeys:
    """The head's keys and allow-list folder from a key folder, checked before ZeroMQ sees them."""
    secret_file = folder / f"{HEAD}.key_secret"
    try:
        public, secret = read_key_file(secret_file)
    except KeyFileError as exc:
        raise KeysError(str(exc)) from None
    if secret is None:
        raise KeysError(f"{secret_file} holds no secret key")
    agents = folder / AGENTS
    if not agents.is_dir():
        raise KeysError(f"{folder} has no allow-list folder {AGENTS}/; make one with 'watchtower keys init'")
    return HeadKeys(public, secret, agents)


class AllowList:
    """The ZAP credentials provider: accepts a client key only if ``agents/`` holds it.

    Called from the authenticator's thread for each handshake; re-reads the folder when it changed.
    """

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self._lock = threading.Lock()
        self._stamp: int | None = None
        self._keys: frozenset[bytes] = frozenset()
        self._refresh()

    def _refresh(self) -> None:
        try:
            stamp = self.folder.stat().st_mtime_ns
        except OSError:  # the folder went away: nobody is listed
            self._stamp, self._keys = None, frozenset()
            return
        if stamp != self._stamp:
            self._keys = frozenset(_listed(self.folder))
            self._stamp = stamp

    @property
    def keys(self) -> frozenset[bytes]:
        return self._keys

    def callback(self, domain: str, key: bytes) -> bool:
        with self._lock:
            self._refresh()
            return key in self._keys


def _listed(folder: Path) -> list[bytes]:
    """The public keys in an allow-list folder; a file that is not a key file admits nobody."""
    keys = []
    for path in sorted(folder.glob("*.key")):
        try:
            keys.append(read_key_file(path)[0])
        except KeyFileError:
            continue
    return keys
