"""Planning before sampling: the Plan rpc answers what a guaranteed
accuracy costs with unadjusted Langevin on an m-strongly convex, M-smooth
target."""

from __future__ import annotations

from typing import Optional, Union

import grpc

from ._errors import SessionError
from ._proto.sluice.v1 import sluice_pb2 as pb
from ._session import connect
from ._types import Curvature, PlanResult, metric_to_wire

#: Full method name of the Plan rpc.
PLAN_METHOD = "/sluice.v1.SluiceService/Plan"


def plan(
    channel_or_target: Union[grpc.Channel, str],
    curvature: Curvature,
    dim: int,
    eps: float,
    metric: str,
    *,
    noise_sd: float = 0.0,
    bias: float = 0.0,
    chains: int = 0,
    evaluations_per_second: float = 0.0,
    timeout: Optional[float] = None,
) -> PlanResult:
    """Returns the step size, horizon, iterations and cost that reach error
    ``eps`` in ``metric`` ("tv": eps in (0, 1/2); "w2": eps > 0 in units of
    theta) for a ``dim``-dimensional target with the given ``curvature``
    (its ``start_distance`` and ``second_moment`` are used; m = 0 needs
    ``second_moment`` and "tv"). ``noise_sd`` and ``bias`` describe
    gradient noise (W2 only: E||noise||^2 <= noise_sd^2 dim, E||E noise||^2
    <= bias^2 dim); ``chains`` (0 means 1) and ``evaluations_per_second``
    (0: unknown) turn the iterations into total evaluations and seconds.

    The constants behind the bounds are recalled from the literature
    (``PlanResult.constants_recalled``): planning guidance, checked by the
    project only on Gaussian targets. Invalid inputs raise
    :class:`SessionError` with code INVALID_ARGUMENT naming the field (e.g.
    "eps", "curvature.smoothness"); an unknown metric string raises
    ValueError before anything is sent.
    """
    req = pb.PlanRequest(
        curvature=pb.Curvature(strong_convexity=curvature.strong_convexity, smoothness=curvature.smoothness),
        dim=dim,
        eps=eps,
        metric=metric_to_wire(metric),  # type: ignore[arg-type]
        noise_sd=noise_sd,
        bias=bias,
        start_distance=curvature.start_distance,
        second_moment=curvature.second_moment,
        chains=chains,
        evaluations_per_second=evaluations_per_second,
    )
    channel = connect(channel_or_target) if isinstance(channel_or_target, str) else channel_or_target
    try:
        rpc = channel.unary_unary(
            PLAN_METHOD,
            request_serializer=pb.PlanRequest.SerializeToString,
            response_deserializer=pb.PlanResponse.FromString,
        )
        try:
            resp = rpc(req, timeout=timeout)
        except grpc.RpcError as err:
            raise SessionError.from_rpc_error(err, call="plan") from None
    finally:
        if isinstance(channel_or_target, str):
            channel.close()
    return PlanResult.from_wire(resp)
