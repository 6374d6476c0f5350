"""The answer frames the client builds by hand (sluice_client._frames)
against protobuf's own serialization of the same messages (the reference
outside this code: the generated classes of sluice.proto): byte for byte
equal, for every quantity, at zero and non-zero scalar fields, for arrays
that need a conversion (float32, Fortran order, a strided view), inside
both request messages; and parsed back by protobuf to the same values."""

from __future__ import annotations

import numpy as np
import pytest

from sluice_client import _frames
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb


def _reference(outer: str, request_id: int, first_row: int, rows: int, dim: int, **arrays: np.ndarray) -> bytes:
    ev = pb.Evaluations(request_id=request_id, first_row=first_row, rows=rows, dim=dim)
    for name, a in arrays.items():
        setattr(ev, name, np.asarray(a, dtype="<f8").tobytes(order="C"))
    msg = pb.SessionRequest(evaluations=ev) if outer == "session" else pb.AttachRequest(evaluations=ev)
    return msg.SerializeToString()


_OUTER = {"session": _frames.SESSION_EVALUATIONS, "attach": _frames.ATTACH_EVALUATIONS}


@pytest.mark.parametrize("outer", ["session", "attach"])
@pytest.mark.parametrize(
    "request_id,first_row",
    # zero fields are left out; 127/128, 2^14 - 1/2^14, 2^21 - 1/2^21 and 2^35
    # cross varint byte lengths; 2^64 - 1 is the largest uint64.
    [(0, 0), (1, 0), (127, 128), (2**14 - 1, 2**14), (2**21 - 1, 2**21), (2**35, 3), (2**64 - 1, 2**31 - 1)],
)
def test_frame_equals_protobuf(outer: str, request_id: int, first_row: int) -> None:
    rng = np.random.default_rng(7)
    rows, dim = 5, 3
    g = rng.standard_normal((rows, dim))
    ld = rng.standard_normal(rows)
    h = rng.standard_normal((rows, dim, dim))
    hv = rng.standard_normal((rows, dim))
    got = _frames.evaluations(_OUTER[outer], request_id, first_row, rows, dim, g, ld, h, hv)
    want = _reference(outer, request_id, first_row, rows, dim, gradients=g, log_densities=ld, hessians=h,
                      hessian_vectors=hv)
    assert got == want
    got = _frames.evaluations(_OUTER[outer], request_id, first_row, rows, dim, gradients=g)
    assert got == _reference(outer, request_id, first_row, rows, dim, gradients=g)


def test_arrays_are_converted_as_protobuf_would_get_them() -> None:
    rng = np.random.default_rng(8)
    base = rng.standard_normal((6, 8))
    for a in (base.astype(np.float32), np.asfortranarray(base), base[::2, ::2], base.astype(">f8")):
        rows, dim = a.shape
        got = _frames.evaluations(_frames.SESSION_EVALUATIONS, 9, 0, rows, dim, gradients=a)
        assert got == _reference("session", 9, 0, rows, dim, gradients=a)
        back = pb.SessionRequest.FromString(got).evaluations
        assert np.array_equal(np.frombuffer(back.gradients, dtype="<f8").reshape(rows, dim), np.asarray(a, dtype=np.float64))


def test_a_large_frame_parses_back() -> None:
    # 64 x 1000, the benchmark's shape: lengths of three varint bytes.
    g = np.random.default_rng(9).standard_normal((64, 1000))
    frame = _frames.evaluations(_frames.SESSION_EVALUATIONS, 12345, 0, 64, 1000, gradients=g)
    assert frame == _reference("session", 12345, 0, 64, 1000, gradients=g)
    ev = pb.SessionRequest.FromString(frame).evaluations
    assert (ev.request_id, ev.rows, ev.dim) == (12345, 64, 1000)
    assert np.frombuffer(ev.gradients, dtype="<f8").tobytes() == g.tobytes()


def test_serializer_passes_frames_and_serializes_messages() -> None:
    ser = _frames.serializer(pb.SessionRequest)
    m = pb.SessionRequest(stop=pb.Stop(reason="done"))
    assert ser(m) == m.SerializeToString()
    assert ser(b"\x01\x02") == b"\x01\x02"
