"""Reading the frames the client receives at every step (a Points frame,
a Draws frame) straight from the message bytes gRPC hands over.

Parsing a SessionResponse with protobuf copies its 512 KB points into the
message, and every read of ``Points.points`` copies them again into a new
bytes object (fresh pages on a busy machine, which cost far more than the
copy itself). Here a small reader of the protobuf wire format walks the
message once and keeps the large bytes fields as memoryviews of the
received bytes; everything else (and any frame it does not take: the
registered, progress and finished frames, and anything it cannot parse)
goes to protobuf's own ``FromString``, so that a malformed message raises
exactly as before.

The reader keeps protobuf's semantics for what it parses (the
Protocol Buffers encoding guide): fields in any order; a scalar or bytes
field given twice keeps the last; a repeated field accepts its packed and
unpacked forms, several times, and concatenates them; a message field
given twice is merged, which equals parsing the concatenation of its
pieces; of the ``frame`` oneof the last member wins; unknown fields, and
known fields with a wire type not theirs, are skipped; a varint keeps its
low 64 bits (int32 fields the low 32, sign-extended) and may be at most
10 bytes long. tests/test_wire.py compares it with ``FromString`` on
random and adversarial frames."""

from __future__ import annotations

from typing import Any, Callable, Dict, List, Optional, Tuple

import numpy as np

from ._proto.sluice.v1 import sluice_pb2 as pb

_MASK64 = (1 << 64) - 1

_NO_INT32 = np.zeros(0, dtype=np.int32)
_NO_INT32.flags.writeable = False
_NO_INT64 = np.zeros(0, dtype=np.int64)
_NO_INT64.flags.writeable = False


class _Irregular(Exception):
    """The bytes are not something this reader takes: protobuf decides."""


def _varint(b: bytes, i: int) -> Tuple[int, int]:
    """The varint at b[i:] (its low 64 bits) and the index after it."""
    x = b[i]
    if x < 0x80:
        return x, i + 1
    v = x & 0x7F
    shift = 7
    i += 1
    while True:
        x = b[i]
        i += 1
        v |= (x & 0x7F) << shift
        if x < 0x80:
            return v & _MASK64, i
        shift += 7
        if shift >= 70:
            raise _Irregular("varint longer than 10 bytes")


def _int32(v: int) -> int:
    return ((v & 0xFFFFFFFF) ^ 0x80000000) - 0x80000000


def _int64(v: int) -> int:
    return v - (1 << 64) if v >> 63 else v


_U64 = np.dtype(np.uint64)
_I32 = np.dtype(np.int32)
_I64 = np.dtype(np.int64)
#: The shift of each byte of a varint of n bytes, for n = 0 ... 10.
_SHIFTS = [np.arange(n, dtype=np.uint64) * np.uint64(7) for n in range(11)]


def _packed(b: bytes, lo: int, hi: int, dtype: np.dtype) -> np.ndarray:
    """The varints of b[lo:hi] as dtype: int32 (an int32 or enum field:
    the low 32 bits, sign-extended) or int64 (the low 64 bits)."""
    seg = b[lo:hi]
    if seg.isascii():  # every varint one byte (chains, rows: the common case)
        return np.frombuffer(seg, dtype=np.uint8).astype(dtype)
    a = np.frombuffer(seg, dtype=np.uint8)
    ends = np.flatnonzero(a < 0x80)
    count = len(ends)
    if count == 0 or ends[-1] != len(a) - 1:
        raise _Irregular("packed varints cut short")
    n = int(ends[0]) + 1
    if n <= 10 and n * count == len(a):
        m = a.reshape(count, n)
        if (m[:, -1] < 0x80).all():
            # Every varint n bytes long (iterations, say): one row each.
            u = ((m & 0x7F).astype(np.uint64) << _SHIFTS[n]).sum(axis=1, dtype=np.uint64)
            return u.view(np.int64).astype(dtype)
    starts = np.empty_like(ends)
    starts[0] = 0
    starts[1:] = ends[:-1] + 1
    lens = ends - starts + 1
    if int(lens.max()) > 10:
        raise _Irregular("varint longer than 10 bytes")
    pos = np.arange(len(a)) - np.repeat(starts, lens)
    vals = (a & 0x7F).astype(np.uint64) << (7 * pos).astype(np.uint64)
    return np.add.reduceat(vals, starts).view(np.int64).astype(dtype)


def _repeated(b: bytes, pieces: List[Tuple[int, int, int]], dtype: np.dtype) -> np.ndarray:
    """A repeated varint field from its pieces (wire type, lo, hi): packed
    runs b[lo:hi] (wire type 2) and single values lo (wire type 0),
    concatenated in order, as dtype (see _packed)."""
    if len(pieces) == 1 and pieces[0][0] == 2:
        return _packed(b, pieces[0][1], pieces[0][2], dtype)
    if not pieces:
        return np.zeros(0, dtype=dtype)
    one = _int32 if dtype == _I32 else _int64
    return np.concatenate(
        [_packed(b, lo, hi, dtype) if wt == 2 else np.array([one(lo)], dtype=dtype) for wt, lo, hi in pieces]
    )


class DrawsFrame:
    """A Draws message as the session reads it: the fields of pb.Draws,
    ``values`` a memoryview of the received bytes, the repeated fields
    numpy arrays."""

    __slots__ = ("seq", "rows", "dim", "values", "chains", "iterations", "from_request_id", "point_rows")

    def __init__(self) -> None:
        self.seq = 0
        self.rows = 0
        self.dim = 0
        self.values: Any = b""
        self.chains: np.ndarray = _NO_INT32
        self.iterations: np.ndarray = _NO_INT64
        self.from_request_id = 0
        self.point_rows: np.ndarray = _NO_INT32


class PointsFrame:
    """A Points message as the session reads it: the fields of pb.Points,
    ``points`` and ``vectors`` memoryviews of the received bytes, the
    repeated fields numpy arrays, ``draws`` a :class:`DrawsFrame` or None
    (absent)."""

    __slots__ = (
        "request_id",
        "first_row",
        "rows",
        "dim",
        "points",
        "chains",
        "quantities",
        "total_rows",
        "vectors",
        "minibatch_groups",
        "full_data",
        "replicates",
        "draws",
    )

    def __init__(self) -> None:
        self.request_id = 0
        self.first_row = 0
        self.rows = 0
        self.dim = 0
        self.points: Any = b""
        self.chains: np.ndarray = _NO_INT32
        self.quantities: np.ndarray = _NO_INT32
        self.total_rows = 0
        self.vectors: Any = b""
        self.minibatch_groups: np.ndarray = _NO_INT32
        self.full_data = False
        self.replicates = 0
        self.draws: Optional[DrawsFrame] = None


def _fields(b: bytes, lo: int, hi: int) -> Any:
    """Yields (field number, wire type, value or lo, hi) for the fields of
    b[lo:hi]: for wire type 0 the varint, for 2 the bounds of the bytes,
    for 1 and 5 their bounds too. Raises _Irregular on groups, invalid
    wire types, field number 0 and anything cut short."""
    i = lo
    while i < hi:
        key, i = _varint(b, i)
        field, wt = key >> 3, key & 7
        if field == 0 or key > 0xFFFFFFFF:
            raise _Irregular("bad key")
        if wt == 0:
            v, i = _varint(b, i)
            yield field, 0, v, i
        elif wt == 2:
            n, i = _varint(b, i)
            j = i + n
            if j > hi:
                raise _Irregular("length past the end")
            yield field, 2, i, j
            i = j
        elif wt == 1 or wt == 5:
            j = i + (8 if wt == 1 else 4)
            if j > hi:
                raise _Irregular("fixed field past the end")
            yield field, wt, i, j
            i = j
        else:  # groups (3, 4) and the invalid 6, 7
            raise _Irregular("wire type")
    if i != hi:
        raise _Irregular("past the end")


# Field numbers, read from the generated descriptors.
def _numbers(m: Any) -> Dict[str, int]:
    return {f.name: f.number for f in m.DESCRIPTOR.fields}


_P = _numbers(pb.Points)
_D = _numbers(pb.Draws)
_D_SEQ, _D_ROWS, _D_DIM, _D_VALUES = _D["seq"], _D["rows"], _D["dim"], _D["values"]
_D_CHAINS, _D_ITERATIONS, _D_FROM, _D_POINT_ROWS = _D["chains"], _D["iterations"], _D["from_request_id"], _D["point_rows"]
_P_REQUEST_ID, _P_FIRST_ROW, _P_ROWS, _P_DIM = _P["request_id"], _P["first_row"], _P["rows"], _P["dim"]
_P_POINTS, _P_CHAINS, _P_QUANTITIES, _P_TOTAL_ROWS = _P["points"], _P["chains"], _P["quantities"], _P["total_rows"]
_P_VECTORS, _P_GROUPS, _P_FULL_DATA, _P_REPLICATES = _P["vectors"], _P["minibatch_groups"], _P["full_data"], _P["replicates"]
_P_DRAWS = _P["draws"]


def _draws(b: bytes, pieces: List[Tuple[int, int]]) -> DrawsFrame:
    """The Draws message made of pieces (lo, hi) of b, merged as protobuf
    merges a message field given more than once."""
    if len(pieces) == 1:
        buf, lo, hi = b, pieces[0][0], pieces[0][1]
    else:
        buf = b"".join(memoryview(b)[lo:hi] for lo, hi in pieces)
        lo, hi = 0, len(buf)
    d = DrawsFrame()
    chains: List[Tuple[int, int, int]] = []
    iterations: List[Tuple[int, int, int]] = []
    point_rows: List[Tuple[int, int, int]] = []
    values = (0, 0)
    for field, wt, x, y in _fields(buf, lo, hi):
        if wt == 0:
            if field == _D_SEQ:
                d.seq = x
            elif field == _D_ROWS:
                d.rows = _int32(x)
            elif field == _D_DIM:
                d.dim = _int32(x)
            elif field == _D_FROM:
                d.from_request_id = x
            elif field == _D_CHAINS:
                chains.append((0, x, 0))
            elif field == _D_ITERATIONS:
                iterations.append((0, x, 0))
            elif field == _D_POINT_ROWS:
                point_rows.append((0, x, 0))
        elif wt == 2:
            if field == _D_VALUES:
                values = (x, y)
            elif field == _D_CHAINS:
                chains.append((2, x, y))
            elif field == _D_ITERATIONS:
                iterations.append((2, x, y))
            elif field == _D_POINT_ROWS:
                point_rows.append((2, x, y))
    d.values = memoryview(buf)[values[0] : values[1]]
    d.chains = _repeated(buf, chains, _I32)
    d.iterations = _repeated(buf, iterations, _I64)
    d.point_rows = _repeated(buf, point_rows, _I32)
    return d


def _points(b: bytes, lo: int, hi: int) -> PointsFrame:
    p = PointsFrame()
    chains: List[Tuple[int, int, int]] = []
    quantities: List[Tuple[int, int, int]] = []
    groups: List[Tuple[int, int, int]] = []
    draws: List[Tuple[int, int]] = []
    points = vectors = (0, 0)
    for field, wt, x, y in _fields(b, lo, hi):
        if wt == 0:
            if field == _P_REQUEST_ID:
                p.request_id = x
            elif field == _P_FIRST_ROW:
                p.first_row = _int32(x)
            elif field == _P_ROWS:
                p.rows = _int32(x)
            elif field == _P_DIM:
                p.dim = _int32(x)
            elif field == _P_TOTAL_ROWS:
                p.total_rows = _int32(x)
            elif field == _P_REPLICATES:
                p.replicates = _int32(x)
            elif field == _P_FULL_DATA:
                p.full_data = x != 0
            elif field == _P_CHAINS:
                chains.append((0, x, 0))
            elif field == _P_QUANTITIES:
                quantities.append((0, x, 0))
            elif field == _P_GROUPS:
                groups.append((0, x, 0))
        elif wt == 2:
            if field == _P_POINTS:
                points = (x, y)
            elif field == _P_VECTORS:
                vectors = (x, y)
            elif field == _P_CHAINS:
                chains.append((2, x, y))
            elif field == _P_QUANTITIES:
                quantities.append((2, x, y))
            elif field == _P_GROUPS:
                groups.append((2, x, y))
            elif field == _P_DRAWS:
                draws.append((x, y))
    mv = memoryview(b)
    p.points = mv[points[0] : points[1]]
    p.vectors = mv[vectors[0] : vectors[1]]
    p.chains = _repeated(b, chains, _I32)
    p.quantities = _repeated(b, quantities, _I32)
    p.minibatch_groups = _repeated(b, groups, _I32)
    if draws:
        p.draws = _draws(b, draws)
    return p


#: What a response deserializer returns: the name of the frame's oneof
#: member (None for an empty frame) and its message: a PointsFrame or
#: DrawsFrame for those two, the protobuf message otherwise.
Frame = Tuple[Optional[str], Any]


def response_reader(message: Any, points: str = "points", draws: str = "") -> Callable[[bytes], Frame]:
    """A response deserializer for gRPC for a message whose oneof
    ``frame`` has a Points member named ``points`` and (optionally) a Draws
    member named ``draws``: those two frames are read here; any other
    frame, and any message this reader does not take, is parsed by
    ``message.FromString``."""
    oneof = message.DESCRIPTOR.oneofs_by_name["frame"]
    members = {f.number: f.name for f in oneof.fields}
    wire_type_2 = set(members)  # every member is a message: wire type 2
    points_n = message.DESCRIPTOR.fields_by_name[points].number
    draws_n = message.DESCRIPTOR.fields_by_name[draws].number if draws else -1
    parse = message.FromString

    def slow(raw: bytes) -> Frame:
        m = parse(raw)
        kind = m.WhichOneof("frame")
        if kind is None:
            return None, None
        sub = getattr(m, kind)
        if kind == points:
            sub = from_points(sub)
        elif kind == draws:
            sub = from_draws(sub)
        return kind, sub

    def read(raw: bytes) -> Frame:
        try:
            case = 0
            pieces: List[Tuple[int, int]] = []
            for field, wt, x, y in _fields(raw, 0, len(raw)):
                if wt == 2 and field in wire_type_2:
                    if field != case:
                        case = field
                        pieces = []
                    pieces.append((x, y))
            if case == points_n:
                if len(pieces) == 1:
                    return points, _points(raw, pieces[0][0], pieces[0][1])
                buf = b"".join(memoryview(raw)[lo:hi] for lo, hi in pieces)
                return points, _points(buf, 0, len(buf))
            if case == draws_n:
                return draws, _draws(raw, pieces)
        except (_Irregular, IndexError, ValueError):
            pass
        return slow(raw)

    return read


def from_points(m: pb.Points) -> PointsFrame:
    """A PointsFrame holding the fields of a parsed pb.Points."""
    p = PointsFrame()
    p.request_id = m.request_id
    p.first_row = m.first_row
    p.rows = m.rows
    p.dim = m.dim
    p.points = m.points
    p.chains = np.array(m.chains, dtype=np.int32)
    p.quantities = np.array(m.quantities, dtype=np.int32)
    p.total_rows = m.total_rows
    p.vectors = m.vectors
    p.minibatch_groups = np.array(m.minibatch_groups, dtype=np.int32)
    p.full_data = m.full_data
    p.replicates = m.replicates
    p.draws = from_draws(m.draws) if m.HasField("draws") else None
    return p


def from_draws(m: pb.Draws) -> DrawsFrame:
    """A DrawsFrame holding the fields of a parsed pb.Draws."""
    d = DrawsFrame()
    d.seq = m.seq
    d.rows = m.rows
    d.dim = m.dim
    d.values = m.values
    d.chains = np.array(m.chains, dtype=np.int32)
    d.iterations = np.array(m.iterations, dtype=np.int64)
    d.from_request_id = m.from_request_id
    d.point_rows = np.array(m.point_rows, dtype=np.int32)
    return d
