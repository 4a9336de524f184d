"""A rack relay: one uplink for many agents, built on ZeroMQ's own steerable proxy (no broker of ours).

Agents (or lower relays) connect their DEALER to the relay's ROUTER; ``zmq.proxy_steerable`` moves every
message to a DEALER connected to the collector (or a higher relay) and moves replies back. The ROUTER adds
the sender's identity in front of the message, so at the collector a frame that crossed two relays reads
``[top relay id, rack relay id, agent id, b"", header, ...]``: everything up to the first empty frame is
the return address (``collector.split_envelope``), and a clock pong sent back with it is unwrapped one
identity per relay on its way down.

Frames pass through untouched: sequence numbers stay the senders' own, so the collector's loss accounting
stays exact per sender, and recordings hold what agents sent. A relay does not pre-aggregate (see the
README's "Benchmarks"). When the uplink is away, the uplink queue fills to ``UPLINK_HWM``, the proxy stops
reading, and agents drop (and count) at their own bounded queues: nothing blocks a training loop.

With keys the listener is a CURVE server with the head's key pair and allow-list (agents keep the same
``--server-key head.key``); the uplink uses an agent key pair of its own, like a node daemon.
"""

from __future__ import annotations

import secrets
import threading

import zmq
from zmq.auth.thread import ThreadAuthenticator

from watchtower.collector import MAX_MESSAGE_BYTES, EndpointError, parse_endpoint
from watchtower.keys import AllowList, HeadKeys

UPLINK_HWM = 100_000  # messages held for the uplink while it is slow or away (then agents drop and count)
LISTEN_HWM = 100_000
LINGER_MS = 500  # on stop, messages still queued upstream get this long to leave


class Relay:
    """Binds and connects in ``__init__`` (errors surface there), relays in ``serve``, cleans up in ``close``."""

    def __init__(self, listen: str, upstream: str, *, context: zmq.Context | None = None,
                 keys: HeadKeys | None = None, uplink_keys: tuple[bytes, bytes, bytes] | None = None) -> None:
        self.endpoint = parse_endpoint(listen, binding=True)
        parse_endpoint(upstream, binding=False)
        self._ctx = context or zmq.Context.instance()
        self._sockets: list[zmq.Socket] = []
        self.authenticator: ThreadAuthenticator | None = None
        control = f"inproc://watchtower-relay-{secrets.randbits(63):x}"
        try:
            self.frontend = self._socket(zmq.ROUTER, LINGER_MS)
            self.frontend.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
            self.frontend.setsockopt(zmq.RCVHWM, LISTEN_HWM)
            if keys is not None:
                self._secure(keys)
            self.frontend.bind(listen)
            self.bound = self.frontend.getsockopt_string(zmq.LAST_ENDPOINT)
            self.backend = self._socket(zmq.DEALER, LINGER_MS)
            self.backend.setsockopt(zmq.SNDHWM, UPLINK_HWM)
            if uplink_keys is not None:  # (own public, own secret, upstream public)
                b = self.backend
                b.curve_publickey, b.curve_secretkey, b.curve_serverkey = uplink_keys
            self.backend.connect(upstream)
            self._control = self._socket(zmq.PAIR, 0)
            self._control.bind(control)
            self._steer = self._socket(zmq.PAIR, 0)
            self._steer.connect(control)
        except zmq.ZMQError as exc:
            self.close()
            raise EndpointError(f"cannot relay {listen} -> {upstream}: {exc.strerror}") from None

    def _socket(self, kind: int, linger: int) -> zmq.Socket:
        sock = self._ctx.socket(kind)
        sock.setsockopt(zmq.LINGER, linger)
        self._sockets.append(sock)
        return sock

    def _secure(self, keys: HeadKeys) -> None:
        """Admit only listed agents, exactly as the collector does (same keys, same allow-list folder)."""
        self.authenticator = ThreadAuthenticator(self._ctx)
        self.authenticator.start()
        self.authenticator.configure_curve_callback("*", AllowList(keys.agents))
        self.frontend.curve_server = True
        self.frontend.curve_publickey = keys.public
        self.frontend.curve_secretkey = keys.secret

    def serve(self, stop: threading.Event, duration_s: float | None = None) -> None:
        """Relay until ``stop`` is set (or ``duration_s`` has passed); then stop the proxy and return."""
        proxy = threading.Thread(target=zmq.proxy_steerable, name="watchtower-relay", daemon=True,
                                 args=(self.frontend, self.backend, None, self._control))
        proxy.start()
        try:
            stop.wait(duration_s)
        finally:
            self._steer.send(b"TERMINATE")
            proxy.join()

    def close(self) -> None:
        for sock in self._sockets:
            sock.close()
        self._sockets.clear()
        if self.authenticator is not None:
            self.authenticator.stop()
            self.authenticator = None
