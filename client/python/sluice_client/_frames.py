"""The wire bytes of the frame the client sends at every step, built by
hand: an Evaluations message (sluice.proto) inside a SessionRequest or an
AttachRequest. Building it as protobuf messages copies each array twice
more (into the message, then out of it when gRPC serializes it), and
serializing a fresh message with a large bytes field costs far more than
the copy on a busy machine (the allocator's fresh pages); here each array
is copied once, by bytes.join, straight from the caller's numpy array.
The field numbers are read from the generated descriptors, and the bytes
equal the message's own serialization (tests/test_frames.py)."""

from __future__ import annotations

from typing import Callable, List, Optional, Union

import numpy as np

from ._proto.sluice.v1 import sluice_pb2 as pb

_WIRE = np.dtype("<f8")

_EV = pb.Evaluations.DESCRIPTOR.fields_by_name
_REQUEST_ID = _EV["request_id"].number
_FIRST_ROW = _EV["first_row"].number
_ROWS = _EV["rows"].number
_DIM = _EV["dim"].number
_GRADIENTS = _EV["gradients"].number
_LOG_DENSITIES = _EV["log_densities"].number
_HESSIANS = _EV["hessians"].number
_HESSIAN_VECTORS = _EV["hessian_vectors"].number

#: Field numbers of ``evaluations`` in the two request messages.
SESSION_EVALUATIONS = pb.SessionRequest.DESCRIPTOR.fields_by_name["evaluations"].number
ATTACH_EVALUATIONS = pb.AttachRequest.DESCRIPTOR.fields_by_name["evaluations"].number

_MASK64 = (1 << 64) - 1


#: The varints of 0 ... 127: one byte each.
_SMALL = [bytes((v,)) for v in range(0x80)]


def _varint(v: int) -> bytes:
    """The base-128 varint of v; a negative value is taken as its 64-bit
    two's complement, as protobuf encodes negative int32 and int64."""
    if 0 <= v < 0x80:
        return _SMALL[v]
    if 0 < v < 0x4000:
        return bytes((v & 0x7F | 0x80, v >> 7))
    if 0 < v < 0x200000:
        return bytes((v & 0x7F | 0x80, (v >> 7) & 0x7F | 0x80, v >> 14))
    v &= _MASK64
    out = bytearray()
    while v >= 0x80:
        out.append((v & 0x7F) | 0x80)
        v >>= 7
    out.append(v)
    return bytes(out)


def _key(field: int, wire_type: int) -> bytes:
    return _varint(field << 3 | wire_type)


_K_REQUEST_ID, _K_FIRST_ROW, _K_ROWS, _K_DIM = (_key(f, 0) for f in (_REQUEST_ID, _FIRST_ROW, _ROWS, _DIM))
_K_GRADIENTS, _K_LOG_DENSITIES, _K_HESSIANS, _K_HESSIAN_VECTORS = (
    _key(f, 2) for f in (_GRADIENTS, _LOG_DENSITIES, _HESSIANS, _HESSIAN_VECTORS)
)


def wire_array(a: np.ndarray) -> np.ndarray:
    """a as little-endian float64 in C order: a itself when it already is
    (no copy), else one converted copy."""
    if a.dtype == _WIRE and a.flags.c_contiguous:
        return a
    return np.ascontiguousarray(a, dtype=_WIRE)


def evaluations(
    outer: int,
    request_id: int,
    first_row: int,
    rows: int,
    dim: int,
    gradients: Optional[np.ndarray] = None,
    log_densities: Optional[np.ndarray] = None,
    hessians: Optional[np.ndarray] = None,
    hessian_vectors: Optional[np.ndarray] = None,
) -> bytes:
    """The serialized request whose field ``outer`` is an Evaluations
    message with these fields; each array (any shape) is sent as its
    little-endian float64 values in C order. Fields at their zero value
    are left out, as proto3 does."""
    head = b""
    if request_id:
        head += _K_REQUEST_ID + _varint(request_id)
    if first_row:
        head += _K_FIRST_ROW + _varint(first_row)
    if rows:
        head += _K_ROWS + _varint(rows)
    if dim:
        head += _K_DIM + _varint(dim)
    parts: List[Union[bytes, np.ndarray]] = [b"", head]
    size = len(head)
    for k, a in (
        (_K_GRADIENTS, gradients),
        (_K_LOG_DENSITIES, log_densities),
        (_K_HESSIANS, hessians),
        (_K_HESSIAN_VECTORS, hessian_vectors),
    ):
        if a is None or a.size == 0:
            continue
        a = wire_array(a)
        k += _varint(a.nbytes)
        parts.append(k)
        parts.append(a)
        size += len(k) + a.nbytes
    parts[0] = _key(outer, 2) + _varint(size)
    return b"".join(parts)


def serializer(message_type: type) -> Callable[[object], bytes]:
    """A request serializer for gRPC that passes bytes built here through
    and serializes every other frame (register, resume, stop, attach) as
    the protobuf message it is."""
    serialize = message_type.SerializeToString

    def ser(m: object) -> bytes:
        if isinstance(m, bytes):
            return m
        return serialize(m)  # type: ignore[no-any-return]

    return ser
