"""Watchtower's own wire format: ZeroMQ multipart frames, columnar, little-endian, versioned.

Every message is a list of frames. Frame 0 is a fixed 40-byte header; frame 1 a small per-kind meta
struct; the rest are raw little-endian arrays (or, for schemas and NIC names, UTF-8 JSON text).
Nothing here uses pickle or eval. ``decode`` validates every field and raises ``WireError`` with a
reason that the collector counts. The byte layout is documented in docs/wire.md.

The node side owns this module; the head side imports it (``agent`` <- ``watchtower``).
"""

from __future__ import annotations

import json
import struct
from dataclasses import dataclass
from enum import IntEnum

import numpy as np

MAGIC = b"wtwr"
VERSION = 1  # what every kind but BATCH and SIGN_OFF is stamped with, unchanged since version 1
VERSION_2 = 2  # adds BATCH and SIGN_OFF; a version-1 reader refuses them (bad-version) rather than misread them
KNOWN_VERSIONS = (VERSION, VERSION_2)

HEADER = struct.Struct("<4sHHQQqII")  # magic, version, kind, sender, seq, wall_ns, count_a, count_b
assert HEADER.size == 40

# Caps: a frame that declares more is rejected before anything is allocated.
MAX_LAYERS = 4096
MAX_EXCHANGES = 65536
MAX_NICS = 64
MAX_NAME_BYTES = 256
MAX_SCHEMA_BYTES = MAX_LAYERS * (MAX_NAME_BYTES + 8) + 4096
MAX_WORLD = 1 << 20
MAX_CHECK_PEERS = 4096  # nodes a pair-check message may name
MAX_CHECK_RESULTS = 4096  # pair-check results in one CHECK message
MAX_ENDPOINT_BYTES = 256
MAX_BATCH_MESSAGES = 1024  # messages in one BATCH
MAX_BATCH_PARTS = 4  # frames of one message in a batch (the most any kind has)
MAX_BATCH_BYTES = 16 << 20  # bytes of the messages in one BATCH


class Kind(IntEnum):
    """Message kinds on the wire."""

    SCHEMA = 1
    STEP = 2
    NODE = 3
    CLOCK_PING = 4
    CLOCK_PONG = 5
    CLOCK_OFFSET = 6
    CHECK_HELLO = 7
    CHECK_PEERS = 8
    CHECK = 9
    BATCH = 10
    SIGN_OFF = 11


class Op(IntEnum):
    """What an exchange record was: point-to-point direction or the collective's kind."""

    SEND = 0
    RECV = 1
    ALLREDUCE = 16
    ALLGATHER = 17
    REDUCE_SCATTER = 18
    BROADCAST = 19
    ALLTOALL = 20
    BARRIER = 21
    REDUCE = 22
    GATHER = 23
    SCATTER = 24


COLLECTIVE_OPS = frozenset(op for op in Op if op >= Op.ALLREDUCE)
NO_PEER = -1
UNKNOWN_WAIT = -(1 << 63)  # wait_ns when the peer's readiness is unknown

# Exchange table rows (int64 [EXCHANGE_COLUMNS, E]).
EXCHANGE_COLUMNS = ("layer", "op", "peer", "group", "nbytes", "start_ns", "end_ns", "wait_ns")
X_LAYER, X_OP, X_PEER, X_GROUP, X_NBYTES, X_START, X_END, X_WAIT = range(len(EXCHANGE_COLUMNS))

STEP_META = struct.Struct("<qqQII")  # step, duration_ns, dropped_total, schema_id, reserved
NODE_META = struct.Struct("<ddd")  # cpu_percent, memory_percent, interval_s
PING_META = struct.Struct("<q")  # t0
PONG_META = struct.Struct("<qqq")  # t0, t1, t2
OFFSET_META = struct.Struct("<qq")  # offset_ns, round_trip_ns
SIGN_OFF_META = struct.Struct("<qQ")  # last_step (-1: none), dropped_total
NIC_COLUMNS = ("sent_Bps", "recv_Bps", "sent_total", "recv_total")
CHECK_META = struct.Struct("<ddQQ")  # period_s, budget (share of nominal), deferred_total, reserved
# Pair-check result rows (int64 [CHECK_COLUMNS, K]).
CHECK_COLUMNS = ("peer", "nbytes", "start_ns", "elapsed_ns")
C_PEER, C_NBYTES, C_START, C_ELAPSED = range(len(CHECK_COLUMNS))

_I64 = np.dtype("<i8")
_F64 = np.dtype("<f8")


class WireError(ValueError):
    """A frame that is not a valid Watchtower message; ``reason`` is a short stable tag for counting."""

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason


@dataclass(frozen=True, slots=True)
class Header:
    kind: Kind
    sender: int
    seq: int
    wall_ns: int
    count_a: int = 0
    count_b: int = 0


@dataclass(frozen=True, slots=True)
class Schema:
    """Who a sender is. Ranks send one at start and again after any drop; node daemons use rank -1."""

    header: Header
    schema_id: int
    rank: int
    world: int
    node: str
    layers: tuple[str, ...]
    job: str = ""
    carries: tuple[tuple[int, tuple[int, ...]], ...] = ()  # (layer, layers whose gradients it carries)


@dataclass(frozen=True, slots=True)
class Step:
    """One rank's step: per-layer compute/exchange nanoseconds and the table of exchanges."""

    header: Header
    step: int
    duration_ns: int
    dropped_total: int
    schema_id: int
    layer_ns: np.ndarray  # int64 [2, L]: compute_ns, exchange_ns
    exchanges: np.ndarray  # int64 [8, E], rows per EXCHANGE_COLUMNS


@dataclass(frozen=True, slots=True)
class NodeSample:
    header: Header
    cpu_percent: float
    memory_percent: float
    interval_s: float
    nics: tuple[str, ...]
    nic_values: np.ndarray  # float64 [4, N], rows per NIC_COLUMNS


@dataclass(frozen=True, slots=True)
class ClockPing:
    header: Header
    t0: int


@dataclass(frozen=True, slots=True)
class ClockPong:
    header: Header
    t0: int
    t1: int
    t2: int


@dataclass(frozen=True, slots=True)
class ClockOffset:
    """A sender's estimate of (collector clock - own clock), the usual NTP estimate."""

    header: Header
    offset_ns: int
    round_trip_ns: int


@dataclass(frozen=True, slots=True)
class SignOff:
    """A rank's last word when its training loop closes the probe: it has finished, not gone silent. Its
    ``dropped_total`` is the final count, so loss at the sender is exact even when the last frame was no step."""

    header: Header
    last_step: int
    dropped_total: int


@dataclass(frozen=True, slots=True)
class CheckHello:
    """A node daemon running pair checks says where other daemons reach its check listener."""

    header: Header
    node: str
    endpoint: str  # HOST:PORT


@dataclass(frozen=True, slots=True)
class CheckPeers:
    """The collector's answer to a CHECK_HELLO: every check listener it knows, and the pairs to favour.

    ``weights`` are (src node, dst node, weight ≥ 1): pairs whose estimate is uncertain or that the job's
    own figures suspect. ``stamp_ns`` is the collector's clock when the weights were set; daemons switch
    to new weights only at a cycle boundary well after it, so that they all plan the same rounds."""

    header: Header
    peers: tuple[tuple[str, str], ...]  # (node, HOST:PORT)
    weights: tuple[tuple[str, str, float], ...]
    stamp_ns: int


@dataclass(frozen=True, slots=True)
class CheckResults:
    """Pair checks a node daemon made from its node to peers: link records of their own kind."""

    header: Header
    period_s: float  # every ordered pair is checked at least this often while the fabric is quiet
    budget: float  # share of the nominal rate the checks may use
    deferred_total: int  # checks put off so far because the job's own exchanges were in flight
    peers: tuple[str, ...]
    results: np.ndarray  # int64 [4, K], rows per CHECK_COLUMNS


Message = (Schema | Step | NodeSample | ClockPing | ClockPong | ClockOffset | CheckHello | CheckPeers | CheckResults
           | SignOff)


def check_name(name: str, what: str = "name") -> str:
    """A name fit for the wire (UTF-8, at most MAX_NAME_BYTES), or ValueError: a probe refuses it at once
    rather than sending frames every collector would reject."""
    try:
        size = len(name.encode("utf-8"))
    except UnicodeEncodeError:
        raise ValueError(f"{what} {name!r} is not valid Unicode text") from None
    if size > MAX_NAME_BYTES:
        raise ValueError(f"{what} {name[:40]!r}... is longer than {MAX_NAME_BYTES} bytes")
    return name


def _header(kind: Kind, sender: int, seq: int, wall_ns: int, count_a: int = 0, count_b: int = 0) -> bytes:
    return HEADER.pack(MAGIC, VERSION, kind, sender, seq, wall_ns, count_a, count_b)


def encode_schema(
    sender: int, seq: int, wall_ns: int, *, schema_id: int, rank: int, world: int, node: str,
    layers: list[str] | tuple[str, ...], job: str = "",
    carries: tuple[tuple[int, tuple[int, ...]], ...] | list[tuple[int, tuple[int, ...]]] = (),
) -> list[bytes]:
    """``carries`` (revision 1.1, optional): which layers' gradients a layer such as a DDP bucket carries,
    as (layer index, [layer indices]); left out of the text when empty, so 1.0 schemas are unchanged."""
    fields: dict[str, object] = {"schema_id": schema_id, "rank": rank, "world": world, "node": node,
                                 "layers": list(layers), "job": job}
    if carries:
        fields["carries"] = [[layer, list(sources)] for layer, sources in carries]
    body = json.dumps(fields, ensure_ascii=False, separators=(",", ":")).encode()
    return [_header(Kind.SCHEMA, sender, seq, wall_ns, len(layers), len(body)), body]


def encode_step(
    sender: int, seq: int, wall_ns: int, *, step: int, duration_ns: int, dropped_total: int, schema_id: int,
    layer_ns: np.ndarray, exchanges: np.ndarray,
) -> list[bytes]:
    """``layer_ns`` is int64 [2, L]; ``exchanges`` is int64 [8, E]. Both are sent as raw bytes."""
    n_layers = layer_ns.shape[1]
    n_exchanges = exchanges.shape[1]
    return [
        _header(Kind.STEP, sender, seq, wall_ns, n_layers, n_exchanges),
        STEP_META.pack(step, duration_ns, dropped_total, schema_id, 0),
        np.ascontiguousarray(layer_ns, dtype=_I64).tobytes(),
        np.ascontiguousarray(exchanges, dtype=_I64).tobytes(),
    ]


def encode_node(
    sender: int, seq: int, wall_ns: int, *, cpu_percent: float, memory_percent: float, interval_s: float,
    nics: list[str] | tuple[str, ...], nic_values: np.ndarray,
) -> list[bytes]:
    names = json.dumps(list(nics), ensure_ascii=False).encode()
    return [
        _header(Kind.NODE, sender, seq, wall_ns, len(nics), len(names)),
        NODE_META.pack(cpu_percent, memory_percent, interval_s),
        names,
        np.ascontiguousarray(nic_values, dtype=_F64).tobytes(),
    ]


def encode_ping(sender: int, seq: int, t0: int) -> list[bytes]:
    return [_header(Kind.CLOCK_PING, sender, seq, t0), PING_META.pack(t0)]


def encode_pong(sender: int, seq: int, t0: int, t1: int, t2: int) -> list[bytes]:
    return [_header(Kind.CLOCK_PONG, sender, seq, t2), PONG_META.pack(t0, t1, t2)]


def encode_offset(sender: int, seq: int, wall_ns: int, offset_ns: int, round_trip_ns: int) -> list[bytes]:
    return [_header(Kind.CLOCK_OFFSET, sender, seq, wall_ns), OFFSET_META.pack(offset_ns, round_trip_ns)]


def encode_sign_off(sender: int, seq: int, wall_ns: int, *, last_step: int, dropped_total: int) -> list[bytes]:
    return [HEADER.pack(MAGIC, VERSION_2, Kind.SIGN_OFF, sender, seq, wall_ns, 0, 0),
            SIGN_OFF_META.pack(last_step, dropped_total)]


def _text(body: object) -> bytes:
    return json.dumps(body, ensure_ascii=False, separators=(",", ":")).encode()


def encode_check_hello(sender: int, seq: int, wall_ns: int, *, node: str, endpoint: str) -> list[bytes]:
    body = _text({"node": node, "endpoint": endpoint})
    return [_header(Kind.CHECK_HELLO, sender, seq, wall_ns, 0, len(body)), body]


def encode_check_peers(sender: int, seq: int, wall_ns: int, *, peers: list[tuple[str, str]] | tuple,
                       weights: list[tuple[str, str, float]] | tuple = (), stamp_ns: int = 0) -> list[bytes]:
    body = _text({"peers": [list(p) for p in peers], "weights": [list(w) for w in weights], "stamp_ns": stamp_ns})
    return [_header(Kind.CHECK_PEERS, sender, seq, wall_ns, len(peers), len(body)), body]


def encode_checks(sender: int, seq: int, wall_ns: int, *, period_s: float, budget: float, deferred_total: int,
                  peers: list[str] | tuple[str, ...], results: np.ndarray) -> list[bytes]:
    """``results`` is int64 [4, K] (rows per CHECK_COLUMNS); ``peer`` indexes ``peers``."""
    names = _text(list(peers))
    return [
        _header(Kind.CHECK, sender, seq, wall_ns, results.shape[1], len(names)),
        CHECK_META.pack(period_s, budget, deferred_total, 0),
        names,
        np.ascontiguousarray(results, dtype=_I64).tobytes(),
    ]


def encode_batch(sender: int, seq: int, wall_ns: int, messages: list[list[bytes]]) -> list[bytes]:
    """Several messages (each with its own header: sender and sequence number intact) as one, so that a node
    daemon sends one message where its ranks sent many: four frames whatever the count, since a receiver
    pays per frame. Frame 1: each message's frame count; frame 2: each frame's length; frame 3: the frames."""
    frames = [frame for message in messages for frame in message]
    body = b"".join(frames)
    head = HEADER.pack(MAGIC, VERSION_2, Kind.BATCH, sender, seq, wall_ns, len(messages), len(body))
    lengths = np.array([len(frame) for frame in frames], dtype="<u4").tobytes()
    return [head, bytes(len(message) for message in messages), lengths, body]


def unpack_batch(frames: list[bytes] | list[memoryview]) -> list[list[memoryview]]:
    """The messages of a BATCH (views into its last frame), each left for ``decode`` to judge as if it came
    alone. A batch that is not exactly what it declares (torn, lying counts or lengths, beyond the caps)
    raises ``WireError`` and is refused whole."""
    header = decode_header(frames[0]) if frames else None
    if header is None or header.kind is not Kind.BATCH:
        raise WireError("bad-batch", "not a batch")
    if header.count_a > MAX_BATCH_MESSAGES or header.count_b > MAX_BATCH_BYTES:
        raise WireError("oversize-batch", f"{header.count_a} messages, {header.count_b} bytes")
    if len(frames) != 4:
        raise WireError("bad-batch", f"{len(frames)} frames, a batch has 4")
    counts, lengths, body = bytes(frames[1]), frames[2], memoryview(frames[3])
    if len(counts) != header.count_a or not header.count_a:
        raise WireError("bad-batch", f"{len(counts)} frame counts for {header.count_a} messages")
    if min(counts) < 1 or max(counts) > MAX_BATCH_PARTS:
        raise WireError("bad-batch", "a message of no frames or too many")
    if len(lengths) != 4 * sum(counts):
        raise WireError("bad-batch", f"{len(lengths) // 4} frame lengths for {sum(counts)} frames")
    ends = np.cumsum(np.frombuffer(lengths, dtype="<u4"), dtype=np.int64).tolist()
    if len(body) != header.count_b or (ends[-1] if ends else 0) != len(body):
        raise WireError("bad-batch", f"frames of {ends[-1] if ends else 0} bytes, body {len(body)}, "
                                     f"declared {header.count_b}")
    out, at, start = [], 0, 0
    for count in counts:
        message = []
        for end in ends[at:at + count]:
            message.append(body[start:end])
            start = end
        out.append(message)
        at += count
    return out


def clock_offset(t0: int, t1: int, t2: int, t3: int) -> tuple[int, int]:
    """NTP's estimate from a two-way exchange: offset = ((t1-t0)+(t2-t3))/2, delay = (t3-t0)-(t2-t1)."""
    return ((t1 - t0) + (t2 - t3)) // 2, (t3 - t0) - (t2 - t1)


# ---------------------------------------------------------------------------------------------- decoding

_PARTS = {
    Kind.SCHEMA: 2,
    Kind.STEP: 4,
    Kind.NODE: 4,
    Kind.CLOCK_PING: 2,
    Kind.CLOCK_PONG: 2,
    Kind.CLOCK_OFFSET: 2,
    Kind.CHECK_HELLO: 2,
    Kind.CHECK_PEERS: 2,
    Kind.CHECK: 4,
    Kind.SIGN_OFF: 2,
}
_META = {
    Kind.STEP: STEP_META,
    Kind.NODE: NODE_META,
    Kind.CLOCK_PING: PING_META,
    Kind.CLOCK_PONG: PONG_META,
    Kind.CLOCK_OFFSET: OFFSET_META,
    Kind.CHECK: CHECK_META,
    Kind.SIGN_OFF: SIGN_OFF_META,
}


def decode_header(frame: bytes | memoryview) -> Header:
    if len(frame) != HEADER.size:
        raise WireError("bad-header-size", f"{len(frame)} bytes, expected {HEADER.size}")
    magic, version, kind, sender, seq, wall_ns, count_a, count_b = HEADER.unpack(frame)
    if magic != MAGIC:
        raise WireError("bad-magic")
    if version not in KNOWN_VERSIONS:
        raise WireError("bad-version", f"version {version}, this reader knows {KNOWN_VERSIONS}")
    try:
        kind = Kind(kind)
    except ValueError:
        raise WireError("bad-kind", str(kind)) from None
    return Header(kind, sender, seq, wall_ns, count_a, count_b)


def peek_kind(frame: bytes | memoryview) -> int | None:
    """The kind number of a header frame without validating the rest (None if it is no header)."""
    if len(frame) != HEADER.size or bytes(frame[:4]) != MAGIC:
        return None
    return int.from_bytes(frame[6:8], "little")


def decode(frames: list[bytes] | list[memoryview]) -> Message:
    """Decode and validate one multipart message. Raises ``WireError`` on anything malformed."""
    if not frames:
        raise WireError("empty")
    header = decode_header(frames[0])
    if header.kind is Kind.BATCH:  # a collector unpacks batches first (``unpack_batch``); one inside is refused
        raise WireError("nested-batch", "a BATCH where a message belongs")
    if len(frames) != _PARTS[header.kind]:
        raise WireError("bad-part-count", f"{header.kind.name} has {len(frames)} parts")
    meta_struct = _META.get(header.kind)
    meta: tuple = ()
    if meta_struct is not None:
        if len(frames[1]) != meta_struct.size:
            raise WireError("bad-meta-size", f"{header.kind.name}: {len(frames[1])} bytes")
        meta = meta_struct.unpack(frames[1])
    if header.kind is Kind.SCHEMA:
        return _decode_schema(header, frames[1])
    if header.kind is Kind.STEP:
        return _decode_step(header, meta, frames[2], frames[3])
    if header.kind is Kind.NODE:
        return _decode_node(header, meta, frames[2], frames[3])
    if header.kind is Kind.CLOCK_PING:
        return ClockPing(header, *meta)
    if header.kind is Kind.CLOCK_PONG:
        return ClockPong(header, *meta)
    if header.kind is Kind.CHECK_HELLO:
        return _decode_check_hello(header, frames[1])
    if header.kind is Kind.CHECK_PEERS:
        return _decode_check_peers(header, frames[1])
    if header.kind is Kind.CHECK:
        return _decode_checks(header, meta, frames[2], frames[3])
    if header.kind is Kind.SIGN_OFF:
        if meta[0] < -1:
            raise WireError("bad-sign-off", f"last step {meta[0]}")
        return SignOff(header, *meta)
    return ClockOffset(header, *meta)


def _json(blob: bytes | memoryview, declared: int, cap: int) -> object:
    if declared != len(blob):
        raise WireError("bad-length", f"declared {declared} bytes, got {len(blob)}")
    if len(blob) > cap:
        raise WireError("oversize", f"{len(blob)} bytes of text, cap {cap}")
    try:
        return json.loads(bytes(blob).decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError):
        raise WireError("bad-text", "not UTF-8 JSON") from None


def _name(value: object, what: str) -> str:
    if not isinstance(value, str):
        raise WireError("bad-name", f"{what} is not a string")
    if len(value.encode()) > MAX_NAME_BYTES:
        raise WireError("bad-name", f"{what} longer than {MAX_NAME_BYTES} bytes")
    return value


def _decode_schema(header: Header, blob: bytes | memoryview) -> Schema:
    if header.count_a > MAX_LAYERS:
        raise WireError("oversize", f"{header.count_a} layers, cap {MAX_LAYERS}")
    body = _json(blob, header.count_b, MAX_SCHEMA_BYTES)
    if not isinstance(body, dict):
        raise WireError("bad-schema", "not an object")
    schema_id, rank, world = body.get("schema_id"), body.get("rank"), body.get("world")
    layers = body.get("layers")
    for what, value in (("schema_id", schema_id), ("rank", rank), ("world", world)):
        if type(value) is not int:
            raise WireError("bad-schema", f"{what} is not an integer")
    if not 0 <= schema_id < 1 << 32:
        raise WireError("bad-schema", "schema_id out of range")
    if not 0 < world <= MAX_WORLD or not -1 <= rank < world:
        raise WireError("bad-schema", f"rank {rank} of world {world}")
    if not isinstance(layers, list) or len(layers) != header.count_a:
        raise WireError("bad-schema", "layer list does not match the header")
    names = tuple(_name(layer, "layer name") for layer in layers)
    if len(set(names)) != len(names):
        raise WireError("bad-schema", "duplicate layer names")
    return Schema(header, schema_id, rank, world, _name(body.get("node"), "node"), names,
                  _name(body.get("job", ""), "job"), _carries(body.get("carries", []), len(names)))


def _carries(value: object, n_layers: int) -> tuple[tuple[int, tuple[int, ...]], ...]:
    """The optional ``carries`` list of a SCHEMA (revision 1.1): pairs of a layer and the distinct other
    layers whose gradients it carries, every index in range, each layer listed once."""
    if not isinstance(value, list) or len(value) > n_layers:
        raise WireError("bad-schema", "carries is not a list of at most one entry per layer")
    out: list[tuple[int, tuple[int, ...]]] = []
    for entry in value:
        if not (isinstance(entry, list) and len(entry) == 2 and isinstance(entry[1], list)
                and len(entry[1]) <= n_layers):
            raise WireError("bad-schema", "carries entry is not [layer, [layers]]")
        layer, sources = entry
        indices = (layer, *sources)
        if any(type(i) is not int or not 0 <= i < n_layers for i in indices):
            raise WireError("bad-schema", "carries names a layer out of range")
        if len(set(indices)) != len(indices):
            raise WireError("bad-schema", "carries repeats a layer")
        out.append((layer, tuple(sources)))
    if len({layer for layer, _ in out}) != len(out):
        raise WireError("bad-schema", "carries lists a layer twice")
    return tuple(out)


def _array(buffer: bytes | memoryview, dtype: np.dtype, rows: int, cols: int) -> np.ndarray:
    expected = rows * cols * dtype.itemsize
    if len(buffer) != expected:
        raise WireError("bad-length", f"array of {len(buffer)} bytes, expected {expected}")
    return np.frombuffer(buffer, dtype=dtype).reshape(rows, cols)


def _decode_step(header: Header, meta: tuple, layers: bytes, table: bytes) -> Step:
    step, duration_ns, dropped_total, schema_id, _ = meta
    if header.count_a > MAX_LAYERS:
        raise WireError("oversize", f"{header.count_a} layers, cap {MAX_LAYERS}")
    if header.count_b > MAX_EXCHANGES:
        raise WireError("oversize", f"{header.count_b} exchanges, cap {MAX_EXCHANGES}")
    if step < 0:
        raise WireError("bad-step", "negative step index")
    if duration_ns < 0:
        raise WireError("bad-timing", "negative step duration")
    layer_ns = _array(layers, _I64, 2, header.count_a)
    exchanges = _array(table, _I64, len(EXCHANGE_COLUMNS), header.count_b)
    if layer_ns.size and layer_ns.min() < 0:
        raise WireError("bad-timing", "negative layer time")
    if exchanges.size:
        if exchanges[X_LAYER].min() < 0 or exchanges[X_LAYER].max() >= header.count_a:
            raise WireError("bad-exchange", "layer index out of range")
        if exchanges[X_NBYTES].min() < 0:
            raise WireError("bad-exchange", "negative byte count")
        if (exchanges[X_END] < exchanges[X_START]).any():
            raise WireError("bad-timing", "exchange ends before it starts")
        wait = exchanges[X_WAIT]
        # negative: the peer was ready before we started (its bytes were already on their way)
        if (wait > exchanges[X_END] - exchanges[X_START]).any():
            raise WireError("bad-timing", "wait longer than its exchange")
        ops = exchanges[X_OP]
        if ops.min() < 0 or ops.max() >= len(_KNOWN_OP) or not _KNOWN_OP[ops].all():
            raise WireError("bad-exchange", "unknown operation")
        peers = exchanges[X_PEER][~_IS_COLLECTIVE[ops]]
        if peers.size and (peers.min() < 0 or peers.max() >= MAX_WORLD):  # a rank indexes arrays downstream
            raise WireError("bad-exchange", "point-to-point peer is not a rank")
    return Step(header, step, duration_ns, dropped_total, schema_id, layer_ns, exchanges)


_KNOWN_OP = np.zeros(256, dtype=bool)  # indexed by op value: a table lookup is far cheaper than np.isin
_KNOWN_OP[[int(op) for op in Op]] = True
_IS_COLLECTIVE = np.zeros(256, dtype=bool)
_IS_COLLECTIVE[[int(op) for op in COLLECTIVE_OPS]] = True


def _decode_node(header: Header, meta: tuple, names_blob: bytes, values: bytes) -> NodeSample:
    cpu, memory, interval = meta
    if header.count_a > MAX_NICS:
        raise WireError("oversize", f"{header.count_a} NICs, cap {MAX_NICS}")
    if not all(np.isfinite((cpu, memory, interval))) or interval <= 0:
        raise WireError("bad-sample", "non-finite or non-positive figure")
    names = _json(names_blob, header.count_b, MAX_NICS * (MAX_NAME_BYTES + 4) + 2)
    if not isinstance(names, list) or len(names) != header.count_a:
        raise WireError("bad-sample", "NIC names do not match the header")
    nics = tuple(_name(name, "NIC name") for name in names)
    nic_values = _array(values, _F64, len(NIC_COLUMNS), header.count_a)
    if nic_values.size and not (np.isfinite(nic_values).all() and (nic_values >= 0).all()):
        raise WireError("bad-sample", "NIC figure not finite and non-negative")
    return NodeSample(header, cpu, memory, interval, nics, nic_values)


def _endpoint(value: object) -> str:
    """HOST:PORT as text (checked for shape here; the daemon resolves it when it connects)."""
    if not isinstance(value, str) or len(value.encode()) > MAX_ENDPOINT_BYTES:
        raise WireError("bad-check", "endpoint is not a string of at most 256 bytes")
    host, sep, port = value.rpartition(":")
    if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise WireError("bad-check", "endpoint is not HOST:PORT")
    return value


def _decode_check_hello(header: Header, blob: bytes | memoryview) -> CheckHello:
    body = _json(blob, header.count_b, 2 * MAX_NAME_BYTES + MAX_ENDPOINT_BYTES + 64)
    if not isinstance(body, dict):
        raise WireError("bad-check", "not an object")
    return CheckHello(header, _name(body.get("node"), "node"), _endpoint(body.get("endpoint")))


def _decode_check_peers(header: Header, blob: bytes | memoryview) -> CheckPeers:
    if header.count_a > MAX_CHECK_PEERS:
        raise WireError("oversize", f"{header.count_a} peers, cap {MAX_CHECK_PEERS}")
    body = _json(blob, header.count_b, MAX_CHECK_PEERS * (3 * MAX_NAME_BYTES + MAX_ENDPOINT_BYTES + 64))
    if not isinstance(body, dict):
        raise WireError("bad-check", "not an object")
    peers, weights, stamp = body.get("peers"), body.get("weights"), body.get("stamp_ns")
    if not isinstance(peers, list) or len(peers) != header.count_a or type(stamp) is not int:
        raise WireError("bad-check", "peer list does not match the header")
    if not isinstance(weights, list) or len(weights) > MAX_CHECK_PEERS:
        raise WireError("bad-check", "weights are not a list within the cap")
    out_peers = []
    for item in peers:
        if not isinstance(item, list) or len(item) != 2:
            raise WireError("bad-check", "a peer is not [node, endpoint]")
        out_peers.append((_name(item[0], "node"), _endpoint(item[1])))
    out_weights = []
    for item in weights:
        if not isinstance(item, list) or len(item) != 3 or type(item[2]) not in (int, float):
            raise WireError("bad-check", "a weight is not [src, dst, number]")
        if not (1.0 <= item[2] < 1e6):
            raise WireError("bad-check", "a weight outside [1, 1e6)")
        out_weights.append((_name(item[0], "node"), _name(item[1], "node"), float(item[2])))
    return CheckPeers(header, tuple(out_peers), tuple(out_weights), stamp)


def _decode_checks(header: Header, meta: tuple, names_blob: bytes, table: bytes) -> CheckResults:
    period_s, budget, deferred, _ = meta
    if header.count_a > MAX_CHECK_RESULTS:
        raise WireError("oversize", f"{header.count_a} check results, cap {MAX_CHECK_RESULTS}")
    if not (np.isfinite(period_s) and period_s > 0 and 0 < budget <= 1):
        raise WireError("bad-check", "period not positive or budget outside (0, 1]")
    names = _json(names_blob, header.count_b, MAX_CHECK_PEERS * (MAX_NAME_BYTES + 4) + 2)
    if not isinstance(names, list) or len(names) > MAX_CHECK_PEERS:
        raise WireError("bad-check", "peer names are not a list within the cap")
    peers = tuple(_name(name, "node") for name in names)
    results = _array(table, _I64, len(CHECK_COLUMNS), header.count_a)
    if results.size:
        if results[C_PEER].min() < 0 or results[C_PEER].max() >= len(peers):
            raise WireError("bad-check", "peer index out of range")
        if results[C_NBYTES].min() <= 0 or results[C_ELAPSED].min() <= 0:
            raise WireError("bad-check", "non-positive bytes or time")
    return CheckResults(header, period_s, budget, deferred, peers, results)


# ---------------------------------------------------------------------------------------- batched decoding

_HEADER_DTYPE = np.dtype([("magic", "S4"), ("version", "<u2"), ("kind", "<u2"), ("sender", "<u8"), ("seq", "<u8"),
                          ("wall_ns", "<i8"), ("count_a", "<u4"), ("count_b", "<u4")])
_STEP_META_DTYPE = np.dtype([("step", "<i8"), ("duration_ns", "<i8"), ("dropped_total", "<u8"),
                             ("schema_id", "<u4"), ("reserved", "<u4")])
assert _HEADER_DTYPE.itemsize == HEADER.size and _STEP_META_DTYPE.itemsize == STEP_META.size


@dataclass(frozen=True, slots=True)
class StepBatch:
    """STEP messages validated together: ``steps[i]`` is message i's Step, or None when it is not a
    plainly valid STEP (decode it alone with ``decode`` for the message or the exact reason). For the
    valid ones the batch also holds their arrays as columns: ``layers`` int64 [2, ΣL] and ``table``
    int64 [8, ΣE] in message order, with ``layer_start``/``table_start`` (length n + 1) marking each
    message's slice, and the per-message maxima the plausibility checks need (-1 where empty)."""

    steps: list[Step | None]
    layers: np.ndarray
    table: np.ndarray
    layer_start: np.ndarray
    table_start: np.ndarray
    layer_max: np.ndarray
    end_max: np.ndarray
    nbytes_max: np.ndarray


def decode_steps(messages: list[list[bytes]] | list[list[memoryview]]) -> StepBatch:
    """Validate many STEP messages with a few numpy calls per column (what a collector drains at once).

    Only what passes every check of ``decode`` is returned decoded; anything in doubt (another kind, a
    wrong size, a failed check) is left as None for ``decode`` to judge alone, so the reasons a hostile
    message is refused with stay exactly those of ``decode``."""
    n = len(messages)
    ok = np.array([len(m) == 4 and len(m[0]) == HEADER.size and len(m[1]) == STEP_META.size for m in messages],
                  dtype=bool)
    where = np.flatnonzero(ok)
    heads = np.zeros(n, _HEADER_DTYPE)
    metas = np.zeros(n, _STEP_META_DTYPE)
    if where.size:
        heads[where] = np.frombuffer(b"".join(messages[i][0] for i in where.tolist()), _HEADER_DTYPE)
        metas[where] = np.frombuffer(b"".join(messages[i][1] for i in where.tolist()), _STEP_META_DTYPE)
    n_layers, n_exchanges = heads["count_a"].astype(np.int64), heads["count_b"].astype(np.int64)
    ok &= (heads["magic"] == MAGIC) & (heads["version"] == VERSION) & (heads["kind"] == Kind.STEP)
    ok &= (n_layers <= MAX_LAYERS) & (n_exchanges <= MAX_EXCHANGES)
    ok &= (metas["step"] >= 0) & (metas["duration_ns"] >= 0)
    sizes = np.array([(len(m[2]), len(m[3])) if len(m) == 4 else (-1, -1) for m in messages], np.int64).reshape(n, 2)
    ok &= (sizes[:, 0] == 2 * 8 * n_layers) & (sizes[:, 1] == len(EXCHANGE_COLUMNS) * 8 * n_exchanges)
    n_layers, n_exchanges = np.where(ok, n_layers, 0), np.where(ok, n_exchanges, 0)
    keep = np.flatnonzero(ok).tolist()
    layer_start = np.concatenate([[0], np.cumsum(n_layers)])
    table_start = np.concatenate([[0], np.cumsum(n_exchanges)])
    flat_layers = np.frombuffer(b"".join(messages[i][2] for i in keep), _I64)
    flat_table = np.frombuffer(b"".join(messages[i][3] for i in keep), _I64)
    # each message's arrays are row-major [2, L] and [8, E]: gather them into columns across messages
    layers = _columns(flat_layers, n_layers[ok], 2)
    table = _columns(flat_table, n_exchanges[ok], len(EXCHANGE_COLUMNS))
    owner_layer = np.repeat(np.arange(n), n_layers)
    owner = np.repeat(np.arange(n), n_exchanges)
    bad = np.zeros(n, dtype=bool)
    if layers.size and layers.min() < 0:
        bad[owner_layer[(layers < 0).any(axis=0)]] = True
    if table.shape[1]:
        ops = table[X_OP]
        known = (ops >= 0) & (ops < len(_KNOWN_OP))
        known[known] = _KNOWN_OP[ops[known]]
        point = known.copy()
        point[known] = ~_IS_COLLECTIVE[ops[known]]
        peer = table[X_PEER]
        wrong = ((table[X_LAYER] < 0) | (table[X_LAYER] >= n_layers[owner]) | (table[X_NBYTES] < 0)
                 | (table[X_END] < table[X_START]) | (table[X_WAIT] > table[X_END] - table[X_START]) | ~known
                 | (point & ((peer < 0) | (peer >= MAX_WORLD))))
        bad[owner[wrong]] = True
    ok &= ~bad
    steps: list[Step | None] = [None] * n
    heads_list, metas_list = heads.tolist(), metas.tolist()
    starts, tstarts = layer_start.tolist(), table_start.tolist()
    for i in np.flatnonzero(ok).tolist():
        _, _, _, sender, seq, wall_ns, count_a, count_b = heads_list[i]
        step, duration_ns, dropped_total, schema_id, _ = metas_list[i]
        steps[i] = Step(Header(Kind.STEP, sender, seq, wall_ns, count_a, count_b), step, duration_ns,
                        dropped_total, schema_id, layers[:, starts[i]:starts[i + 1]],
                        table[:, tstarts[i]:tstarts[i + 1]])
    return StepBatch(steps, layers, table, layer_start, table_start,
                     _segment_max(np.maximum(layers[0], layers[1]), layer_start),
                     _segment_max(table[X_END], table_start), _segment_max(table[X_NBYTES], table_start))


def _columns(flat: np.ndarray, counts: np.ndarray, rows: int) -> np.ndarray:
    """Row-major [rows, c_i] blocks laid end to end in ``flat`` -> one [rows, Σc_i] array of their columns."""
    if not flat.size:
        return np.zeros((rows, 0), _I64)
    if (counts == counts[0]).all():  # blocks of one width (the usual drain): one transposing copy
        return flat.reshape(len(counts), rows, int(counts[0])).transpose(1, 0, 2).reshape(rows, -1)
    ends = np.cumsum(counts * rows).tolist()
    return np.concatenate([flat[end - rows * c:end].reshape(rows, c) for end, c in zip(ends, counts.tolist(),
                                                                                         strict=True)], axis=1)


def _segment_max(values: np.ndarray, start: np.ndarray) -> np.ndarray:
    """The maximum of each slice ``values[start[i]:start[i+1]]``, -1 for an empty slice."""
    out = np.full(len(start) - 1, -1, dtype=np.int64)
    lengths = np.diff(start)
    full = np.flatnonzero(lengths)
    if full.size:
        out[full] = np.maximum.reduceat(values, start[full])
    return out
