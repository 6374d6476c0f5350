"""The session's own reader of Points and Draws frames (sluice_client._wire)
against protobuf's parser of the same bytes (the reference outside this
code: ``FromString`` of the generated classes of sluice.proto, with the
rules of the Protocol Buffers encoding guide): for every frame, the reader
gives the values protobuf gives, or raises where protobuf raises. Frames
are built from protobuf's own serialization of single fields, put
together in random order, repeated, split, interleaved with unknown fields
and fields of the wrong wire type, with overlong and 10-byte varints,
nested Draws given twice, several members of the oneof, and then cut
short and flipped at random bytes. Fixed seeds."""

from __future__ import annotations

from typing import Any, List, Optional, Tuple

import numpy as np
import pytest

from sluice_client import _wire
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb



class _Counted:
    """A message class whose FromString counts its calls: the frames the
    reader hands to protobuf rather than reading them itself."""

    def __init__(self, message: Any) -> None:
        self.DESCRIPTOR = message.DESCRIPTOR
        self._message = message
        self.calls = 0

    def FromString(self, raw: bytes) -> Any:  # noqa: N802 - protobuf's name
        self.calls += 1
        return self._message.FromString(raw)


_SESSION = _Counted(pb.SessionResponse)
_ATTACH = _Counted(pb.AttachResponse)
READ_SESSION = _wire.response_reader(_SESSION, "points", "draws")  # type: ignore[arg-type]
READ_ATTACH = _wire.response_reader(_ATTACH, "points")  # type: ignore[arg-type]


def read_itself(raw: bytes, read: Any = None) -> None:
    """Asserts that the reader read raw itself, without protobuf."""
    before = _SESSION.calls + _ATTACH.calls
    check(raw) if read is None else check(raw, read, pb.AttachResponse, "")
    assert _SESSION.calls + _ATTACH.calls == before, "handed to protobuf"

_INT32_MIN, _INT32_MAX = -(2**31), 2**31 - 1

# protobuf's warning for a stray end-group tag in flipped bytes (it then
# stops parsing, as the reader, which hands such frames to it, does too).
pytestmark = pytest.mark.filterwarnings("ignore:Unexpected end-group tag")


def varint(v: int) -> bytes:
    """The base-128 varint of v (negative values as 64-bit two's complement)."""
    v &= (1 << 64) - 1
    out = bytearray()
    while True:
        b = v & 0x7F
        v >>= 7
        if v:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def key(field: int, wire_type: int) -> bytes:
    return varint(field << 3 | wire_type)


def ld(field: int, payload: bytes) -> bytes:
    """A length-delimited field."""
    return key(field, 2) + varint(len(payload)) + payload


def reference(raw: bytes, message: Any, points: str, draws: str) -> Tuple[Optional[str], Any]:
    """What protobuf makes of raw, as the reader's types; raises as protobuf."""
    m = message.FromString(raw)
    kind = m.WhichOneof("frame")
    if kind is None:
        return None, None
    sub = getattr(m, kind)
    if kind == points:
        return kind, _wire.from_points(sub)
    if kind == draws:
        return kind, _wire.from_draws(sub)
    return kind, sub


def same(a: Any, b: Any) -> bool:
    if isinstance(a, (_wire.PointsFrame, _wire.DrawsFrame)):
        if type(a) is not type(b):
            return False
        return all(same(getattr(a, s), getattr(b, s)) for s in type(a).__slots__)
    if isinstance(a, np.ndarray):
        return isinstance(b, np.ndarray) and a.dtype == b.dtype and np.array_equal(a, b)
    if isinstance(a, (bytes, memoryview)):
        return isinstance(b, (bytes, memoryview)) and bytes(a) == bytes(b)
    return type(a) is type(b) and a == b


def check(raw: bytes, read: Any = READ_SESSION, message: Any = pb.SessionResponse, draws: str = "draws") -> Any:
    """Asserts that the reader and protobuf agree on raw: the same frame,
    or both raising. Returns the frame (None when both raised)."""
    try:
        want = reference(raw, message, "points", draws)
    except Exception:  # noqa: BLE001 - protobuf's DecodeError; the reader must raise too
        with pytest.raises(Exception):
            read(raw)
        return None
    got = read(raw)
    assert got[0] == want[0]
    if got[0] in ("points", draws):
        assert same(got[1], want[1]), (got[1], want[1])
    else:
        assert got[1] == want[1]
    return got


def random_draws(rng: np.random.Generator, by_reference: bool) -> pb.Draws:
    rows, dim = int(rng.integers(0, 6)), int(rng.integers(1, 5))
    d = pb.Draws(
        seq=int(rng.integers(0, 2**64, dtype=np.uint64)) if rng.random() < 0.3 else int(rng.integers(0, 10**6)),
        rows=rows,
        dim=dim,
        chains=rng.integers(-3, 300, rows).tolist(),
        iterations=rng.integers(-(2**63), 2**63 - 1, rows, dtype=np.int64).tolist()
        if rng.random() < 0.3
        else rng.integers(0, 100000, rows).tolist(),
    )
    if by_reference:
        d.from_request_id = int(rng.integers(0, 2**40))
        d.point_rows.extend(rng.integers(-1, 70, rows).tolist())
        n = sum(1 for r in d.point_rows if r < 0)
        d.values = rng.standard_normal(n * dim).tobytes()
    else:
        d.values = rng.standard_normal(rows * dim).tobytes()
    return d


def random_points(rng: np.random.Generator) -> pb.Points:
    rows, dim = int(rng.integers(0, 6)), int(rng.integers(1, 5))
    p = pb.Points(
        request_id=int(rng.integers(0, 2**64, dtype=np.uint64)) if rng.random() < 0.3 else int(rng.integers(0, 300)),
        first_row=int(rng.integers(_INT32_MIN, _INT32_MAX)) if rng.random() < 0.2 else int(rng.integers(0, 3)),
        rows=rows,
        dim=dim,
        points=rng.standard_normal(rows * dim).tobytes(),
        chains=rng.integers(0, 200, rows).tolist() if rng.random() < 0.8 else rng.integers(_INT32_MIN, _INT32_MAX, rows).tolist(),
        quantities=rng.integers(-2, 6, int(rng.integers(0, 4))).tolist(),
        total_rows=int(rng.integers(0, 10)),
        full_data=bool(rng.random() < 0.5),
        replicates=int(rng.integers(0, 4)),
    )
    if rng.random() < 0.3:
        p.vectors = rng.standard_normal(rows * dim).tobytes()
    if rng.random() < 0.3:
        p.minibatch_groups.extend(rng.integers(-1, 5, rows).tolist())
    if rng.random() < 0.7:
        p.draws.CopyFrom(random_draws(rng, by_reference=rng.random() < 0.7))
    return p


def fields_of(m: Any) -> List[bytes]:
    """m's fields, each serialized by protobuf on its own."""
    out = []
    for f, _ in m.ListFields():
        one = type(m)()
        if f.label == f.LABEL_REPEATED:
            getattr(one, f.name).extend(getattr(m, f.name))
        elif f.message_type is not None:
            getattr(one, f.name).CopyFrom(getattr(m, f.name))
        else:
            setattr(one, f.name, getattr(m, f.name))
        out.append(one.SerializeToString())
    return out


def unknown_field(rng: np.random.Generator) -> bytes:
    field = int(rng.choice([14, 15, 99, 1000, 2**29 - 1]))
    wt = int(rng.choice([0, 1, 2, 5]))
    if wt == 0:
        return key(field, 0) + varint(int(rng.integers(0, 2**63)))
    if wt == 1:
        return key(field, 1) + rng.bytes(8)
    if wt == 5:
        return key(field, 5) + rng.bytes(4)
    return ld(field, rng.bytes(int(rng.integers(0, 20))))


def shuffled(rng: np.random.Generator, m: Any, unknown: bool) -> bytes:
    """m's fields in random order, with unknown fields among them."""
    parts = fields_of(m)
    if unknown:
        parts += [unknown_field(rng) for _ in range(int(rng.integers(1, 4)))]
    rng.shuffle(parts)  # type: ignore[arg-type]
    return b"".join(parts)


def test_frames_as_protobuf_writes_them() -> None:
    rng = np.random.default_rng(11)
    for _ in range(300):
        raw = pb.SessionResponse(points=random_points(rng)).SerializeToString()
        assert check(raw)[0] == "points"
        read_itself(raw)
        raw = pb.SessionResponse(draws=random_draws(rng, rng.random() < 0.5)).SerializeToString()
        assert check(raw)[0] == "draws"
        read_itself(raw)
        raw = pb.AttachResponse(points=random_points(rng)).SerializeToString()
        assert check(raw, READ_ATTACH, pb.AttachResponse, "")[0] == "points"
        read_itself(raw, READ_ATTACH)


def test_the_benchmark_frame() -> None:
    # 64 x 1000 points with their draws by reference, as the server sends
    # them to a client that set draws_in_points.
    rng = np.random.default_rng(12)
    x = rng.standard_normal((64, 1000))
    d = pb.Draws(seq=64 * 5000, rows=64, dim=1000, chains=range(64), iterations=[5001] * 64, from_request_id=10001,
                 point_rows=range(64))
    raw = pb.SessionResponse(points=pb.Points(request_id=10001, rows=64, dim=1000, points=x.tobytes(), chains=range(64),
                                              quantities=[pb.QUANTITY_GRADIENT], total_rows=64, draws=d)).SerializeToString()
    kind, p = check(raw)
    read_itself(raw)
    assert kind == "points"
    assert np.array_equal(np.frombuffer(p.points, dtype="<f8").reshape(64, 1000), x)
    # The points are a view of the received bytes, not a copy.
    assert isinstance(p.points, memoryview) and p.points.obj is raw


def test_fields_in_any_order_with_unknown_fields() -> None:
    rng = np.random.default_rng(13)
    for _ in range(300):
        p = random_points(rng)
        body = shuffled(rng, p, unknown=True)
        if p.HasField("draws") and rng.random() < 0.7:
            # the nested Draws shuffled too
            rest = b"".join(f for f in fields_of(p) if not f.startswith(key(13, 2)))
            body = rest + ld(13, shuffled(rng, p.draws, unknown=True))
        raw = ld(2, body)
        if rng.random() < 0.5:
            raw = unknown_field(rng) + raw + unknown_field(rng)
        read_itself(raw)
        read_itself(ld(3, shuffled(rng, random_draws(rng, True), unknown=True)))


def test_repeats_keep_the_last_scalar_and_join_repeated_fields() -> None:
    rng = np.random.default_rng(14)
    for _ in range(200):
        a, b = random_points(rng), random_points(rng)
        # Every field of a then of b: scalars and bytes from b where b has
        # them, repeated fields concatenated, the nested Draws merged.
        raw = ld(2, shuffled(rng, a, unknown=False) + shuffled(rng, b, unknown=False))
        read_itself(raw)
        # Split into two top-level pieces: merged the same way.
        read_itself(ld(2, a.SerializeToString()) + ld(2, b.SerializeToString()))
        # A repeated field in several packed runs, and unpacked.
        chains = rng.integers(-5, 200, 6).tolist()
        runs = [ld(6, b"".join(varint(c) for c in chains[:2])), ld(6, b""), ld(6, b"".join(varint(c) for c in chains[2:4]))]
        runs += [key(6, 0) + varint(c) for c in chains[4:]]
        rng.shuffle(runs)  # type: ignore[arg-type]
        raw = ld(2, a.SerializeToString() + b"".join(runs))
        got = check(raw)
        read_itself(raw)
        assert got is not None and len(got[1].chains) == len(a.chains) + 6
        it = rng.integers(0, 2**40, 3).tolist()
        draws = ld(6, b"".join(varint(v) for v in it[:2])) + key(6, 0) + varint(it[2]) + key(1, 0) + varint(7)
        read_itself(ld(2, ld(13, draws) + ld(13, random_draws(rng, True).SerializeToString())))


def test_varints_as_protobuf_reads_them() -> None:
    # Overlong encodings, int32 fields given values beyond 32 bits (low 32
    # bits kept, sign-extended), bools other than 1, 10-byte varints with
    # spare bits in the last byte, and an 11-byte varint (an error).
    def overlong(v: int, extra: int) -> bytes:
        b = bytearray(varint(v))
        b[-1] |= 0x80
        b += b"\x80" * (extra - 1) + b"\x00"
        return bytes(b)

    cases = [
        key(3, 0) + overlong(5, 3),
        key(3, 0) + varint(2**33 + 5),
        key(2, 0) + varint(-7),
        key(2, 0) + varint(2**31),
        key(11, 0) + varint(2),
        key(11, 0) + varint(2**40),
        key(11, 0) + overlong(0, 4),
        key(1, 0) + b"\xff" * 9 + b"\x7f",
        key(1, 0) + b"\xff" * 9 + b"\x01",
        key(1, 0) + b"\x80" * 10 + b"\x00",
        ld(6, b"\xff" * 9 + b"\x01" + b"\x05" + b"\x85\x80\x00"),
        ld(6, b"\xff" * 9 + b"\x7f"),
        ld(6, b"\x80" * 10 + b"\x00"),
        ld(6, b"\x85"),
        ld(7, varint(2**35 + 3) + varint(-1)),
        ld(10, varint(-1) * 3),
        key(12, 0) + varint(-1),
    ]
    for body in cases:
        check(ld(2, body))
        check(ld(2, ld(13, body)))
    for i in [0, 1, 2, 3, 4, 5, 6, 7, 8, 10, 11, 14, 15, 16]:  # all but the 11-byte varints and the cut run
        body = cases[i]
        read_itself(ld(2, body))


def test_wrong_wire_types_are_skipped_as_unknown() -> None:
    rng = np.random.default_rng(15)
    for _ in range(100):
        p = random_points(rng)
        odd = [
            key(5, 0) + varint(3),  # points as a varint
            key(3, 2) + varint(1) + b"\x09",  # rows as bytes
            key(3, 5) + b"\x01\x02\x03\x04",
            key(13, 0) + varint(4),  # draws as a varint
            key(1, 1) + rng.bytes(8),
            key(6, 5) + rng.bytes(4),  # a repeated field as fixed32
        ]
        parts = fields_of(p) + [odd[int(rng.integers(len(odd)))] for _ in range(2)]
        rng.shuffle(parts)  # type: ignore[arg-type]
        read_itself(ld(2, b"".join(parts)))
        read_itself(key(2, 0) + varint(5) + ld(2, b"".join(parts)))  # the oneof member as a varint: unknown


def test_the_last_member_of_the_oneof_wins() -> None:
    rng = np.random.default_rng(16)
    p1, p2 = random_points(rng).SerializeToString(), random_points(rng).SerializeToString()
    d = random_draws(rng, False).SerializeToString()
    progress = pb.Progress(steps=3).SerializeToString()
    registered = pb.Registered(session_id="s").SerializeToString()
    for raw, kind in [
        (ld(2, p1) + ld(3, d), "draws"),
        (ld(3, d) + ld(2, p1), "points"),
        (ld(2, p1) + ld(3, d) + ld(2, p2), "points"),  # p2 alone: the switch cleared p1
        (ld(2, p1) + ld(4, progress), "progress"),
        (ld(4, progress) + ld(2, p1), "points"),
        (ld(1, registered) + ld(2, p1) + ld(1, registered), "registered"),
        (b"", None),
        (unknown_field(rng), None),
    ]:
        got = check(raw)
        assert got is not None and got[0] == kind


def test_groups_and_bad_wire_types_go_to_protobuf() -> None:
    rng = np.random.default_rng(17)
    p = random_points(rng).SerializeToString()
    group = key(20, 3) + key(1, 0) + varint(5) + key(20, 4)
    for raw in [
        ld(2, p + group),
        ld(2, group + p),
        group + ld(2, p),
        ld(2, p + key(20, 4)),  # an end group without a start: an error
        ld(2, p + key(20, 6)),
        ld(2, p + key(20, 7)),
        ld(2, p + key(0, 0) + varint(1)),  # field number 0: an error
        ld(2, p) + key(2, 2) + varint(100),  # length past the end
    ]:
        check(raw)


def test_cut_short_and_flipped_bytes() -> None:
    rng = np.random.default_rng(18)
    for _ in range(40):
        raw = pb.SessionResponse(points=random_points(rng)).SerializeToString()
        for n in range(0, len(raw), max(1, len(raw) // 60)):
            check(raw[:n])
        for _ in range(60):
            b = bytearray(raw)
            for _ in range(int(rng.integers(1, 4))):
                i = int(rng.integers(len(b)))
                b[i] = int(rng.integers(256))
            check(bytes(b))
    for _ in range(20):
        raw = pb.SessionResponse(draws=random_draws(rng, True)).SerializeToString()
        for n in range(len(raw)):
            check(raw[:n])


def test_buffers_are_reused_only_when_nothing_refers_to_them() -> None:
    # The session copies received points into aligned arrays of a small
    # pool (_session._Buffers) and reuses one only when CPython's reference
    # count says nothing outside the pool refers to it: values kept by the
    # caller (or a view of them) are never overwritten.
    from sluice_client._session import _Buffers

    rng = np.random.default_rng(19)
    pool = _Buffers(keep=2)

    def frame(x: np.ndarray) -> memoryview:
        raw = b"\x00" * 3 + x.tobytes()  # at an odd offset, as in a received message
        return memoryview(raw)[3:]

    def address(a: np.ndarray) -> int:
        return int(a.__array_interface__["data"][0])

    x1, x2, x3 = (rng.standard_normal((4, 5)) for _ in range(3))
    a = pool.copy(frame(x1), 4, 5)
    assert a.flags.aligned and not a.flags.writeable and np.array_equal(a, x1)
    first = address(a)
    del a
    b = pool.copy(frame(x2), 4, 5)
    assert address(b) == first and np.array_equal(b, x2)  # reused: nothing referred to it
    kept = b[1:]  # a view keeps it
    del b
    c = pool.copy(frame(x3), 4, 5)
    assert address(c) != first
    assert np.array_equal(kept, x2[1:]) and np.array_equal(c, x3)
    # Both in use, the pool full: a new array, the kept ones untouched.
    d = pool.copy(frame(x1), 4, 5)
    assert len({address(d), address(c), first}) == 3
    assert np.array_equal(kept, x2[1:]) and np.array_equal(c, x3) and np.array_equal(d, x1)
    e = pool.copy(frame(x1), 2, 10)  # another size
    assert e.shape == (2, 10) and np.array_equal(e.ravel(), x1.ravel())
