"""Refused handshakes seen from the agent's side: a refused agent never gets a frame through, so only a
monitor on its own socket can tell its user why (wrong keys, not on the allow-list, no keys at all)."""

from __future__ import annotations

import zmq
from zmq.utils.monitor import recv_monitor_message

HANDSHAKE_EVENTS = (zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
                    | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL | zmq.EVENT_HANDSHAKE_FAILED_AUTH)


def refusal_in_words(event: int, value: int) -> str:
    """A refused handshake, in words for the agent's user."""
    if event == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
        return "its key is not on the collector's allow-list" if value == 400 else f"authentication failed ({value})"
    if event == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL:
        if value == zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH:
            return "the collector and this agent disagree on keys (one uses them, the other not)"
        if value == zmq.PROTOCOL_ERROR_ZMTP_CRYPTOGRAPHIC:
            return "the collector's key is not the one given with --server-key"
        return f"protocol error {value}"
    return "the handshake failed"


class HandshakeWatch:
    """The newest handshake outcome of one socket, read without blocking from the thread that owns the watch
    (the socket itself may belong to another thread, as a proxy's backend does)."""

    def __init__(self, sock: zmq.Socket) -> None:
        self._sock = sock
        self._monitor: zmq.Socket | None = sock.get_monitor_socket(HANDSHAKE_EVENTS)
        self._refused: str | None = None

    def refused(self) -> str | None:
        """Why the collector refused the last handshake, or None once one succeeded (or before any)."""
        if self._monitor is not None:
            while self._monitor.poll(0):
                event = recv_monitor_message(self._monitor)
                if event["event"] == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                    self._refused = None
                else:
                    self._refused = refusal_in_words(event["event"], event["value"])
        return self._refused

    def close(self) -> None:
        """Stop watching (before the socket closes); ``refused`` keeps answering with the last outcome."""
        if self._monitor is not None:
            self._sock.disable_monitor()
            self._monitor.close()
            self._monitor = None
