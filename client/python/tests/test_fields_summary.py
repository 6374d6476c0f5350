"""Completeness of the Python types against the wire API, and the summary.

Field lists are read from the generated descriptors of
proto/sluice/v1/sluice.proto, so a field added to the proto and forgotten
in the Python client fails here:

* every leaf field of Register is filled by ``Spec.to_register`` when every
  Spec field is set, and every Spec field reaches the Register;
* every leaf field of Progress, Finished, Registered, PlanResponse and
  FollowHeader
  changes the Python value that ``from_wire`` builds from it.

The summary's quantiles are checked against the definition of Hyndman and
Fan (1996), definition 7, on hand-made draws, and, on a live session, its
interval against the exact stationary law of unadjusted Langevin on a
Gaussian (an AR(1) recursion, derived in the test).
"""

from __future__ import annotations

import csv
import dataclasses
import enum
import math
import struct
import tempfile
import typing
from pathlib import Path
from typing import Any, Callable, Iterator, List, Tuple

import grpc
import numpy as np
import pytest
from google.protobuf.descriptor import Descriptor, FieldDescriptor
from google.protobuf.message import Message

import sluice_client as sc
from sluice_client import _types
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb

from test_sluice_client import DEADLINE_SECONDS, Z_MAX, require_target

Path_ = Tuple[FieldDescriptor, ...]

#: Leaf fields of Register that no Spec field sets on purpose (the others
#: are filled from a Spec field or derived from one: start_rows from the
#: shape of start, noise.kind from the presence of noise):
#: accepts_draw_references and draws_in_points say what this client can
#: do, not what the session is; Session sets them unless given
#: full_draws=True (test_draw_references_are_rebuilt).
REGISTER_NOT_FROM_SPEC: "set[str]" = {"accepts_draw_references", "draws_in_points"}


def leaf_paths(desc: Descriptor, prefix: Path_ = ()) -> Iterator[Path_]:
    """Every scalar, enum, bytes or string field reachable from desc through
    message fields of the sluice.v1 package, as a path of fields."""
    for f in desc.fields:
        if f.message_type is not None and f.message_type.full_name.startswith("sluice.v1."):
            yield from leaf_paths(f.message_type, prefix + (f,))
        else:
            yield prefix + (f,)


def dotted(path: Path_) -> str:
    return ".".join(f.name for f in path)


def distinctive(f: FieldDescriptor) -> Any:
    """A value unlike the field's default."""
    if f.type == FieldDescriptor.TYPE_ENUM:
        return f.enum_type.values[1].number
    if f.type == FieldDescriptor.TYPE_BOOL:
        return True
    if f.type in (FieldDescriptor.TYPE_DOUBLE, FieldDescriptor.TYPE_FLOAT):
        return 0.75
    if f.type == FieldDescriptor.TYPE_STRING:
        return "x"
    if f.type == FieldDescriptor.TYPE_BYTES:
        return struct.pack("<d", 0.75)
    return 3  # every integer type


def parent_of(msg: Message, path: Path_) -> Message:
    """Creates the path's enclosing messages (one element of each repeated
    one) and returns the innermost."""
    for f in path[:-1]:
        if f.label == FieldDescriptor.LABEL_REPEATED:
            container = getattr(msg, f.name)
            msg = container[0] if len(container) else container.add()
        else:
            msg = getattr(msg, f.name)
            msg.SetInParent()
    return msg


def candidates(f: FieldDescriptor) -> List[Any]:
    """The distinctive value of a field, or every non-zero enum value."""
    if f.type == FieldDescriptor.TYPE_ENUM:
        return [v.number for v in f.enum_type.values if v.number != 0]
    return [distinctive(f)]


def set_leaf(msg: Message, path: Path_, value: Any) -> None:
    parent, f = parent_of(msg, path), path[-1]
    if f.label == FieldDescriptor.LABEL_REPEATED:
        getattr(parent, f.name).append(value)
    else:
        setattr(parent, f.name, value)


def is_set(msg: Message, path: Path_) -> bool:
    """Whether the leaf holds a non-default value in msg (any element of a
    repeated enclosing message)."""
    f = path[0]
    if len(path) > 1:
        if f.label == FieldDescriptor.LABEL_REPEATED:
            return any(is_set(m, path[1:]) for m in getattr(msg, f.name))
        return msg.HasField(f.name) and is_set(getattr(msg, f.name), path[1:])
    v = getattr(msg, f.name)
    if f.label != FieldDescriptor.LABEL_REPEATED and f.has_presence:
        return msg.HasField(f.name)  # an optional field is set when present, whatever its value
    return len(v) > 0 if f.label == FieldDescriptor.LABEL_REPEATED else v != f.default_value


def flatten(x: Any) -> Any:
    """A comparable image of a Python value of the client."""
    if dataclasses.is_dataclass(x) and not isinstance(x, type):
        return tuple((f.name, flatten(getattr(x, f.name))) for f in dataclasses.fields(x))
    if isinstance(x, (tuple, list)):
        return tuple(flatten(v) for v in x)
    if isinstance(x, np.ndarray):
        return ("array", x.shape, tuple(x.ravel().tolist()))
    if isinstance(x, enum.Enum):
        return x.value
    return x


def check_every_leaf_read(desc: Descriptor, convert: Any) -> List[str]:
    """The leaves of desc whose value does not change convert(message); an
    enum leaf is read when any of its non-zero values changes it."""
    missing = []
    for path in leaf_paths(desc):
        base = desc._concrete_class()
        parent_of(base, path)
        changed = False
        for value in candidates(path[-1]):
            full = desc._concrete_class()
            full.CopyFrom(base)
            set_leaf(full, path, value)
            changed = changed or flatten(convert(base)) != flatten(convert(full))
        if not changed:
            missing.append(dotted(path))
    return missing


def test_progress_fields_all_read() -> None:
    assert check_every_leaf_read(pb.Progress.DESCRIPTOR, sc.Progress.from_wire) == []


def test_follow_header_fields_all_read() -> None:
    assert check_every_leaf_read(pb.FollowHeader.DESCRIPTOR, sc.FollowHeader.from_wire) == []


def test_finished_fields_all_read() -> None:
    assert check_every_leaf_read(pb.Finished.DESCRIPTOR, lambda m: sc.Summary.from_wire(m, None, 0)) == []


def test_registered_and_plan_fields_all_read() -> None:
    assert check_every_leaf_read(pb.Registered.DESCRIPTOR, sc.Registered.from_wire) == []
    assert check_every_leaf_read(pb.PlanResponse.DESCRIPTOR, sc.PlanResult.from_wire) == []


#: Values for Spec fields whose type alone does not give a valid one (the
#: arrays have dim = 2 values).
SPECIAL = {
    "dim": 2,
    "start": np.full(2, 0.75),
    "names": ("a", "b"),
    "kernel": "mala",
    "metric": "tv",
    "penalty_centre": np.full(2, 0.75),
    "mean": np.full(2, 0.75),
    "owner_evaluates": False,
    "preconditioner": np.full(2, 0.75),
    "metric_form": "dense",
}


def filled(cls: type) -> Any:
    """An instance of the dataclass cls with every field set to a
    non-default value, nested dataclasses included."""
    hints = typing.get_type_hints(cls, vars(_types))
    kw = {}
    for f in dataclasses.fields(cls):
        t = hints[f.name]
        if f.name in SPECIAL:
            kw[f.name] = SPECIAL[f.name]
            continue
        inner = [a for a in typing.get_args(t) if a is not type(None)]
        if typing.get_origin(t) is typing.Union and len(inner) == 1 and dataclasses.is_dataclass(inner[0]):
            kw[f.name] = filled(inner[0])
        elif t is bool:
            kw[f.name] = True
        elif t is int:
            kw[f.name] = 3
        elif t is float:
            kw[f.name] = 0.75
        else:
            raise AssertionError(f"{cls.__name__}.{f.name}: no filler for type {t}")
    return cls(**kw)


def test_every_register_field_comes_from_the_spec() -> None:
    reg = filled(sc.Spec).to_register()
    unset = [dotted(p) for p in leaf_paths(pb.Register.DESCRIPTOR) if not is_set(reg, p)]
    assert sorted(set(unset) - REGISTER_NOT_FROM_SPEC) == []


def test_every_spec_field_reaches_the_register() -> None:
    base = sc.Spec(dim=2, chains=1, start=np.zeros(2), step=0.1)
    full = filled(sc.Spec)
    dead = []
    for f in dataclasses.fields(sc.Spec):
        change = {f.name: getattr(full, f.name)}
        if f.name == "dim":  # the filled dim equals the base's: start must change with it
            change = {"dim": 1, "start": np.zeros(1)}
        one = dataclasses.replace(base, **change)
        if one.to_register() == base.to_register():
            dead.append(f.name)
    assert dead == []


# --- the summary -------------------------------------------------------


def make_summary(values: np.ndarray, chains: np.ndarray, names: Tuple[str, ...], mcse: float = 0.003) -> sc.Summary:
    fin = pb.Finished(reason=pb.FINISH_REASON_DRAWS_COLLECTED)
    for i, n in enumerate(names):
        fin.parameters.add(name=n, mean=float(values[:, i].mean()), sd=float(values[:, i].std(ddof=1)),
                           count=values.shape[0])
        fin.progress.parameters.add(name=n, mean=0.0, sd=1.0, rhat=1.0012, bulk_ess=812.4, tail_ess=640.6,
                                    mcse_mean=mcse)
    iters = np.zeros(values.shape[0], dtype=np.int64)
    for c in np.unique(chains):
        iters[chains == c] = np.arange(1, int((chains == c).sum()) + 1)
    return sc.Summary.from_wire(fin, None, values.shape[0], (values, chains.astype(np.int32), iters))


def test_quantiles_follow_the_linear_interpolation_definition() -> None:
    # Hyndman and Fan (1996), definition 7: with n order statistics
    # x(1..n), Q(p) = x(k) + g (x(k+1) - x(k)), h = (n - 1) p + 1,
    # k = floor(h), g = h - k. The values 0, 1, ..., 100 (n = 101), shuffled:
    # Q(0.05) = 5, Q(0.5) = 50, Q(0.95) = 95; at level 0.5, Q(0.25) = 25 and
    # Q(0.75) = 75; 0..9 (n = 10) at p = 0.05 gives h = 1.45: 0.45.
    rng = np.random.default_rng(3)
    v = rng.permutation(101).astype(float).reshape(101, 1)
    s = make_summary(v, np.zeros(101, dtype=np.int32), ("a",)).stats()[0]
    got = (s.interval_low, s.median, s.interval_high)
    assert np.allclose(got, (5.0, 50.0, 95.0), rtol=1e-12, atol=0) and s.interval_level == 0.9, got
    q = make_summary(v, np.zeros(101, dtype=np.int32), ("a",)).stats(level=0.5)[0]
    assert np.allclose((q.interval_low, q.interval_high), (25.0, 75.0), rtol=1e-12, atol=0)
    w = make_summary(np.arange(10.0).reshape(10, 1), np.zeros(10, dtype=np.int32), ("a",)).stats()[0]
    assert math.isclose(w.interval_low, 0.45, rel_tol=1e-12) and math.isclose(w.interval_high, 8.55, rel_tol=1e-12)
    assert set(s.as_dict()) == {"name", "mean", "mean_error", "sd", "interval_level", "interval_low",
                                "interval_high", "median", "rhat", "ess_bulk", "ess_tail"}
    assert (s.rhat, s.ess_bulk, s.ess_tail, s.mean_error) == (1.0012, 812.4, 640.6, 0.003)
    with pytest.raises(ValueError):
        make_summary(v, np.zeros(101, dtype=np.int32), ("a",)).stats(level=1.0)


def test_table_layout() -> None:
    v = np.column_stack([np.linspace(-1.0, 2.0, 40), np.linspace(10.0, 30.0, 40)])
    s = make_summary(v, np.repeat([0, 1], 20), ("alpha", "beta_long_name"))
    text = str(s)
    lines = text.splitlines()
    assert lines[0] == "sluice session: draws collected"
    assert lines[1].startswith("2 chains, 40 draws received")
    header = lines[2]
    for col in ("parameter", "mean ± error", "sd", "interval (90 %)", "R-hat", "ESS bulk/tail"):
        assert col in header
    # The mean and the interval to the first significant digit of the
    # error (0.003: three decimals): mean 0.5 and the 5 % and 95 % points.
    lo, hi = np.quantile(v[:, 0], [0.05, 0.95])
    assert lines[3].split() == ["alpha", "0.500", "±", "0.003", f"{v[:, 0].std(ddof=1):.3g}",
                                f"{lo:.3f}", "–", f"{hi:.3f}", "1.001", "812/641"]
    assert lines[4].startswith("beta_long_name")
    assert "interval (50 %)" in s.table(level=0.5)


def test_save_csv_npy_npz() -> None:
    rng = np.random.default_rng(11)
    chains = np.tile([0, 1, 2], 5)
    v = rng.normal(size=(15, 2))
    s = make_summary(v, chains, ("a", "b"))
    with tempfile.TemporaryDirectory() as tmp:
        p = s.save(Path(tmp) / "d.csv")
        with p.open() as f:
            rows = list(csv.reader(f))
        assert rows[0] == ["chain", "iteration", "a", "b"]
        got = np.array([[float(x) for x in r[2:]] for r in rows[1:]])
        np.testing.assert_array_equal(got, v)  # 17 significant digits: exact
        assert [int(r[0]) for r in rows[1:]] == chains.tolist()
        a = np.load(s.save(Path(tmp) / "d.npy"))
        assert a.shape == (3, 5, 2)
        np.testing.assert_array_equal(a[1], v[chains == 1])
        z = np.load(s.save(Path(tmp) / "d.npz"))
        np.testing.assert_array_equal(z["values"], v)
        np.testing.assert_array_equal(z["chain"], chains)
        assert z["names"].tolist() == ["a", "b"]
        with pytest.raises(ValueError):
            s.save(Path(tmp) / "d.txt")
    ragged = make_summary(v[:14], chains[:14], ("a", "b"))
    with pytest.raises(ValueError, match="different numbers"):
        ragged.draws_by_chain()


def test_live_summary_interval_matches_ula_stationary_law() -> None:
    # Target N(0, 1/lam) in one dimension. Unadjusted Langevin with step h
    # is the AR(1) recursion x' = (1 - h lam) x + sqrt(2 h) xi (derived
    # here from the update x' = x + h grad log pi(x) + sqrt(2h) xi), whose
    # stationary law is N(0, v) with v = 2h / (1 - (1 - h lam)^2)
    # = 1 / (lam (1 - h lam / 2)). The 5 % and 95 % points are
    # -+1.6448536 sqrt(v) (normal quantile z_0.95, from memory).
    lam, h = 2.0, 0.2
    v = 1.0 / (lam * (1.0 - h * lam / 2.0))
    rho = 1.0 - h * lam
    chains, n = 8, 5000
    spec = sc.Spec(dim=1, chains=chains, start=np.zeros(1), step=h, burn_in=200, draws_per_chain=n, seed=77,
                   names=["x"])
    s = sc.run(require_target(), spec, lambda x: -lam * x, timeout=DEADLINE_SECONDS)
    assert s.draws is not None and s.draws.shape == (chains * n, 1) == (s.draws_received, 1)
    # The server's mean and sd are over the same draws the client kept.
    assert math.isclose(s.mean[0], float(s.draws.mean()), rel_tol=1e-9, abs_tol=1e-12)
    assert math.isclose(s.sd[0], float(s.draws.std(ddof=1)), rel_tol=1e-9)
    st = s.stats()[0]
    # Standard error of a sample p-quantile: sqrt(p (1 - p) tau / N) / f(q)
    # with f the density at q and tau the integrated autocorrelation time
    # of the indicator 1{x <= q}. For a Gaussian AR(1) the indicator's lag-k
    # correlation is at most rho^k (the maximal correlation of a bivariate
    # normal pair is its correlation: Gebelein 1941), so tau <= (1 + rho) /
    # (1 - rho).
    tau = (1 + rho) / (1 - rho)
    z = 1.6448536
    q = z * math.sqrt(v)
    dens = math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi * v)
    se = math.sqrt(0.05 * 0.95 * tau / (chains * n)) / dens
    assert abs(st.interval_low + q) < Z_MAX * se, (st.interval_low, -q, se)
    assert abs(st.interval_high - q) < Z_MAX * se, (st.interval_high, q, se)
    by_chain = s.draws_by_chain()
    assert by_chain.shape == (chains, n, 1)
    assert math.isfinite(st.rhat) and math.isfinite(st.ess_bulk) and math.isfinite(st.mean_error)
    assert "x" in str(s) and "interval (90 %)" in str(s)


def test_live_curvature_probe() -> None:
    # Target N(0, diag(1, 1/4)): the potential's Hessian is diag(1, 4), so
    # M = 4 and m = 1. The probe's power iterations on finite-difference
    # Hessian-vector products are exact on a quadratic up to rounding, and
    # converge like (1/4)^k: 30 iterations leave ~1e-18.
    Q = np.diag([1.0, 4.0])
    iters, chains, n = 30, 2, 10
    spec = sc.Spec(dim=2, chains=chains, start=np.array([0.3, -0.2]), step=0.1, draws_per_chain=n,
                   curvature_probe_iterations=iters, seed=1)
    s = sc.run(require_target(), spec, lambda x: -x @ Q, timeout=DEADLINE_SECONDS)
    c = s.progress.curvature
    assert math.isclose(c.probed_smoothness, 4.0, rel_tol=1e-6), c
    assert math.isclose(c.probed_strong_convexity, 1.0, rel_tol=1e-6), c
    # One gradient per iteration each way (sluice.proto, Register.
    # curvature_probe_iterations), all counted in the budget.
    assert c.probe_evaluations >= 2 * iters
    assert s.progress.evaluations_used == c.probe_evaluations + chains * n


def test_live_rejection_gives_exact_draws() -> None:
    # Target pi_tilde(x) = exp(-x^2 / 2), i.e. N(0, 1) up to a constant;
    # envelope q = N(0, s^2) with s = 1.5. pi_tilde / q =
    # s sqrt(2 pi) exp(-x^2 (1 - 1/s^2) / 2) <= s sqrt(2 pi), so
    # log_bound = log(s sqrt(2 pi)) holds, and a proposal is accepted with
    # probability integral(pi_tilde) / (s sqrt(2 pi)) = 1 / s (von Neumann's
    # rejection method). The draws are i.i.d. N(0, 1): the mean has
    # standard error 1 / sqrt(N), the sample variance sqrt(2 / N).
    s_env, chains, n = 1.5, 4, 1000
    spec = sc.Spec(dim=1, chains=chains, kernel="rejection", start=np.zeros(1), step=0.0, draws_per_chain=n,
                   seed=2, names=["x"],
                   envelope=sc.Envelope(mean=np.zeros(1), scale=s_env,
                                        log_bound=float(np.log(s_env * np.sqrt(2 * np.pi)))))
    s = sc.run(require_target(), spec, lambda x: -x, log_density=lambda x: -0.5 * x[:, 0] ** 2,
               timeout=DEADLINE_SECONDS)
    assert s.reason == sc.FinishReason.DRAWS_COLLECTED and s.draws is not None
    x = s.draws[:, 0]
    N = x.size
    assert N == chains * n
    assert abs(x.mean()) * math.sqrt(N) < Z_MAX
    assert abs(x.var(ddof=1) - 1.0) / math.sqrt(2.0 / N) < Z_MAX
    # Acceptance over every proposal: each proposal is one evaluation.
    proposals = s.progress.evaluations_used
    rate = s.progress.kernel.acceptance_rate
    assert abs(rate - 1.0 / s_env) / math.sqrt(rate * (1 - rate) / proposals) < Z_MAX
    assert s.progress.kernel.evaluations_per_step_mean >= 1.0


class _Broken(grpc.RpcError):
    """The error a call raises when the connection drops mid-stream."""

    def code(self) -> grpc.StatusCode:
        return grpc.StatusCode.UNAVAILABLE

    def details(self) -> str:
        return "connection dropped"

    def trailing_metadata(self) -> tuple:
        return ()


class _BrokenChannel:
    """Plays frames on the Session rpc, then fails without a Finished frame."""

    def __init__(self, frames: List[pb.SessionResponse]) -> None:
        self.frames = frames

    def stream_stream(self, method: str, request_serializer: object, response_deserializer: Callable[[bytes], object]) -> object:
        frames = [response_deserializer(f.SerializeToString()) for f in self.frames]  # as gRPC hands them over

        class Call:
            def __init__(self, requests: Iterator[pb.SessionRequest]) -> None:
                self.requests = requests

            def __iter__(self) -> Iterator[pb.SessionResponse]:
                next(self.requests)  # Register
                yield from frames
                raise _Broken()

            def cancel(self) -> bool:
                return True

        return lambda requests, timeout=None: Call(requests)


def test_session_error_keeps_what_was_received() -> None:
    # A session that fails with no Finished frame still hands back the
    # draws and the last progress that arrived (SessionError.received).
    vals = np.arange(6.0).reshape(3, 2)
    frames = [
        pb.SessionResponse(registered=pb.Registered(session_id="s9", names=["a", "b"])),
        pb.SessionResponse(draws=pb.Draws(seq=0, rows=3, dim=2, values=sc.to_wire(vals), chains=[0, 1, 0],
                                          iterations=[1, 1, 2])),
        pb.SessionResponse(progress=pb.Progress(steps=4, evaluations_used=8)),
    ]
    spec = sc.Spec(dim=2, chains=2, start=np.zeros(2), step=0.1)
    with pytest.raises(sc.SessionError) as info:
        # Resuming off: the broken stream's error is what this checks.
        sc.run(_BrokenChannel(frames), spec, lambda x: -x, resume=sc.ResumePolicy(attempts=0))  # type: ignore[arg-type]
    err = info.value
    assert err.code == grpc.StatusCode.UNAVAILABLE and err.summary is None
    got = err.received
    assert got is not None and got.reason == sc.FinishReason.UNSPECIFIED
    assert got.registered is not None and got.registered.session_id == "s9"
    assert (got.progress.steps, got.progress.evaluations_used, got.draws_received) == (4, 8, 3)
    assert got.draws is not None
    np.testing.assert_array_equal(got.draws, vals)
    assert got.draw_chains is not None and got.draw_chains.tolist() == [0, 1, 0]
