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
    v, n = _varint(seg, 0)
    count = len(seg) // n
    if count * n == len(seg) and seg == seg[:n] * count:
        # One value repeated (the iterations of the chains of one step).
        return np.full(count, _int32(v) if dtype == _I32 else _int64(v), dtype=dtype)
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


def _scan(b: bytes, lo: int, hi: int, listed: frozenset) -> Tuple[Dict[int, Any], Dict[int, List[Tuple[int, int, int]]]]:
    """The fields of the message b[lo:hi] in one pass: ``last`` maps each
    key (field number << 3 | wire type) to its last value (a varint's
    value; the bounds (lo, hi) of a length-delimited or fixed field), and
    ``pieces`` maps each field number in ``listed`` (repeated fields and
    message fields, whose every occurrence counts) to its occurrences in
    order: (0, value, 0) for a varint, (2, lo, hi) for a length-delimited
    run. Raises _Irregular on groups, invalid wire types, field number 0
    and anything cut short."""
    last: Dict[int, Any] = {}
    pieces: Dict[int, List[Tuple[int, int, int]]] = {}
    i = lo
    while i < hi:
        key = b[i]
        if key < 0x80:
            i += 1
        else:
            key, i = _varint(b, i)
            if key > 0xFFFFFFFF:
                raise _Irregular("bad key")
        wt = key & 7
        field = key >> 3
        if field == 0:
            raise _Irregular("field number 0")
        if wt == 0:
            v = b[i]
            if v < 0x80:
                i += 1
            else:
                v, i = _varint(b, i)
            if field in listed:
                pieces.setdefault(field, []).append((0, v, 0))
            else:
                last[key] = v
        elif wt == 2:
            n = b[i]
            if n < 0x80:
                i += 1
            else:
                n, i = _varint(b, i)
            j = i + n
            if j > hi:
                raise _Irregular("length past the end")
            if field in listed:
                pieces.setdefault(field, []).append((2, i, j))
            else:
                last[key] = (i, j)
            i = j
        elif wt == 1 or wt == 5:
            i += 8 if wt == 1 else 4
            if i > hi:
                raise _Irregular("fixed field past the end")
        else:  # groups (3, 4) and the invalid 6, 7
            raise _Irregular("wire type")
    return last, pieces


def _varints(pieces: Dict[int, List[Tuple[int, int, int]]], field: int) -> List[Tuple[int, int, int]]:
    """The occurrences of a repeated varint field: its packed runs and its
    single values (a fixed-width occurrence is an unknown field)."""
    return pieces.get(field, [])


def _messages(pieces: Dict[int, List[Tuple[int, int, int]]], field: int) -> List[Tuple[int, int]]:
    """The occurrences of a message field (a varint in its place is an
    unknown field)."""
    return [(lo, hi) for wt, lo, hi in pieces.get(field, ()) if wt == 2]


def _key(field: int, wire_type: int) -> int:
    return field << 3 | wire_type


_D_LISTED = frozenset((_D_CHAINS, _D_ITERATIONS, _D_POINT_ROWS))
_P_LISTED = frozenset((_P_CHAINS, _P_QUANTITIES, _P_GROUPS, _P_DRAWS))
_DK_SEQ, _DK_ROWS, _DK_DIM, _DK_FROM = (_key(f, 0) for f in (_D_SEQ, _D_ROWS, _D_DIM, _D_FROM))
_DK_VALUES = _key(_D_VALUES, 2)
_PK_REQUEST_ID, _PK_FIRST_ROW, _PK_ROWS, _PK_DIM, _PK_TOTAL_ROWS, _PK_REPLICATES, _PK_FULL_DATA = (
    _key(f, 0) for f in (_P_REQUEST_ID, _P_FIRST_ROW, _P_ROWS, _P_DIM, _P_TOTAL_ROWS, _P_REPLICATES, _P_FULL_DATA)
)
_PK_POINTS, _PK_VECTORS = _key(_P_POINTS, 2), _key(_P_VECTORS, 2)
_NOWHERE = (0, 0)


def _draws(b: bytes, pieces: List[Tuple[int, int]]) -> DrawsFrame:
    """The Draws message made of pieces (lo, hi) of b, merged as protobuf
    merges a message field given more than once."""
    if len(pieces) == 1:
        buf, lo, hi = b, pieces[0][0], pieces[0][1]
    else:
        buf = b"".join(memoryview(b)[lo:hi] for lo, hi in pieces)
        lo, hi = 0, len(buf)
    last, listed = _scan(buf, lo, hi, _D_LISTED)
    d = DrawsFrame()
    d.seq = last.get(_DK_SEQ, 0)
    d.rows = _int32(last.get(_DK_ROWS, 0))
    d.dim = _int32(last.get(_DK_DIM, 0))
    d.from_request_id = last.get(_DK_FROM, 0)
    values = last.get(_DK_VALUES, _NOWHERE)
    d.values = memoryview(buf)[values[0] : values[1]]
    d.chains = _repeated(buf, _varints(listed, _D_CHAINS), _I32)
    d.iterations = _repeated(buf, _varints(listed, _D_ITERATIONS), _I64)
    d.point_rows = _repeated(buf, _varints(listed, _D_POINT_ROWS), _I32)
    return d


def _points(b: bytes, lo: int, hi: int) -> PointsFrame:
    last, listed = _scan(b, lo, hi, _P_LISTED)
    p = PointsFrame()
    p.request_id = last.get(_PK_REQUEST_ID, 0)
    p.first_row = _int32(last.get(_PK_FIRST_ROW, 0))
    p.rows = _int32(last.get(_PK_ROWS, 0))
    p.dim = _int32(last.get(_PK_DIM, 0))
    p.total_rows = _int32(last.get(_PK_TOTAL_ROWS, 0))
    p.replicates = _int32(last.get(_PK_REPLICATES, 0))
    p.full_data = last.get(_PK_FULL_DATA, 0) != 0
    mv = memoryview(b)
    points = last.get(_PK_POINTS, _NOWHERE)
    p.points = mv[points[0] : points[1]]
    vectors = last.get(_PK_VECTORS, _NOWHERE)
    p.vectors = mv[vectors[0] : vectors[1]]
    p.chains = _repeated(b, _varints(listed, _P_CHAINS), _I32)
    p.quantities = _repeated(b, _varints(listed, _P_QUANTITIES), _I32)
    p.minibatch_groups = _repeated(b, _varints(listed, _P_GROUPS), _I32)
    draws = _messages(listed, _P_DRAWS)
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
