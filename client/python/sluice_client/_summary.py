"""Reading a finished session: per-parameter statistics (the server's mean,
sd, R-hat, ESS and Monte Carlo error, and quantiles of the draws this client
received), the text table ``str(summary)`` prints, and the draw files
``Summary.save`` writes."""

from __future__ import annotations

import csv
import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Dict, List, Sequence, Tuple, Union

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from ._types import Summary

#: The interval level of ``str(summary)`` and of ``Summary.stats()``.
DEFAULT_INTERVAL_LEVEL = 0.90


@dataclass(frozen=True)
class ParameterStats:
    """One parameter of a finished session.

    ``mean`` and ``sd`` are the server's, over every kept draw;
    ``mean_error`` is the Monte Carlo standard error of the mean, and
    ``rhat``, ``ess_bulk`` and ``ess_tail`` the server's last diagnostics
    (computed on a bounded, evenly thinned window of the draws for long
    runs). ``median`` and the equal-tailed interval ``interval_low`` to
    ``interval_high`` of probability ``interval_level`` are quantiles of
    the draws this client received (linear interpolation between order
    statistics, numpy's default). A figure that is not available (no
    diagnostics yet, no draws kept) is NaN."""

    name: str
    mean: float
    mean_error: float
    sd: float
    interval_level: float
    interval_low: float
    interval_high: float
    median: float
    rhat: float
    ess_bulk: float
    ess_tail: float

    def as_dict(self) -> Dict[str, Union[str, float]]:
        """The fields by name (``name``, ``mean``, ``mean_error``, ``sd``,
        ``interval_level``, ``interval_low``, ``interval_high``, ``median``,
        ``rhat``, ``ess_bulk``, ``ess_tail``)."""
        return asdict(self)


def parameter_stats(summary: "Summary", level: float = DEFAULT_INTERVAL_LEVEL) -> Tuple[ParameterStats, ...]:
    """Returns the statistics of every parameter in the summary (see
    :class:`ParameterStats`), with an interval of probability ``level`` in
    (0, 1)."""
    if not 0.0 < level < 1.0:
        raise ValueError(f"sluice_client: interval level {level}; want a probability in (0, 1)")
    diags = {d.name: d for d in summary.progress.parameters}
    draws = summary.draws
    out: List[ParameterStats] = []
    nan = math.nan
    for i, p in enumerate(summary.parameters):
        d = diags.get(p.name)
        low = high = median = nan
        if draws is not None and draws.shape[0] > 0 and i < draws.shape[1]:
            lo_q, hi_q = (1.0 - level) / 2.0, (1.0 + level) / 2.0
            low, median, high = (float(v) for v in np.quantile(draws[:, i], [lo_q, 0.5, hi_q]))
        out.append(
            ParameterStats(
                name=p.name,
                mean=p.mean,
                mean_error=d.mcse_mean if d is not None else nan,
                sd=p.sd,
                interval_level=level,
                interval_low=low,
                interval_high=high,
                median=median,
                rhat=d.rhat if d is not None else nan,
                ess_bulk=d.bulk_ess if d is not None else nan,
                ess_tail=d.tail_ess if d is not None else nan,
            )
        )
    return tuple(out)


def _decimals(error: float) -> int:
    """Decimals that show a value to the first significant digit of its
    Monte Carlo error (0.003 -> 3), or -1 when the error is unusable."""
    if not math.isfinite(error) or error <= 0.0:
        return -1
    return int(min(12, max(0, -math.floor(math.log10(error)))))


def _fmt(x: float, decimals: int, sig: int = 4) -> str:
    if not math.isfinite(x):
        return "n/a"
    if decimals >= 0:
        return f"{x:.{decimals}f}"
    return f"{x:.{sig}g}"


def _level_text(level: float) -> str:
    return f"{100.0 * level:g} %"


def render_table(summary: "Summary", level: float = DEFAULT_INTERVAL_LEVEL) -> str:
    """The text of ``str(summary)``: a heading with the session's outcome
    and cost, then one row per parameter with the columns ``parameter``,
    ``mean ± error``, ``sd``, ``interval (90 %)`` (low – high),
    ``R-hat`` and ``ESS bulk/tail``. The mean, its error and the interval
    are printed to the first significant digit of the error."""
    reg = summary.registered
    head = f"sluice session {reg.session_id}: {summary.reason.value}" if reg else f"sluice session: {summary.reason.value}"
    if summary.message:
        head += f" ({summary.message})"
    p = summary.progress
    chains = f"{reg.kernel}, " if reg and reg.kernel else ""
    if summary.draw_chains is not None and summary.draw_chains.size:
        chains += f"{np.unique(summary.draw_chains).size} chains, "
    lines = [
        head,
        f"{chains}{summary.draws_received} draws received, {p.evaluations_used} evaluations, "
        f"{p.seconds_used:.3g} s",
    ]
    for c in summary.checks:
        lines.append(f"check {c.name}: {c.status.value}: {c.message}")
    stats = parameter_stats(summary, level)
    if not stats:
        lines.append("no parameters reported")
        return "\n".join(lines)
    rows = []
    for s in stats:
        dec = _decimals(s.mean_error)
        rows.append(
            (
                s.name,
                _fmt(s.mean, dec),
                _fmt(s.mean_error, dec, 2) if math.isfinite(s.mean_error) else "n/a",
                _fmt(s.sd, -1, 3),
                _fmt(s.interval_low, dec),
                _fmt(s.interval_high, dec),
                _fmt(s.rhat, 3),
                "n/a" if not math.isfinite(s.ess_bulk) else f"{s.ess_bulk:.0f}/{s.ess_tail:.0f}",
            )
        )
    w = [max(len(r[k]) for r in rows) for k in range(8)]
    cells = [
        (r[0], f"{r[1].rjust(w[1])} ± {r[2].ljust(w[2])}", r[3], f"{r[4].rjust(w[4])} – {r[5].ljust(w[5])}", r[6], r[7])
        for r in rows
    ]
    header = ("parameter", "mean ± error", "sd", f"interval ({_level_text(level)})", "R-hat", "ESS bulk/tail")
    widths = [max(len(header[k]), *(len(c[k]) for c in cells)) for k in range(6)]
    right = (False, True, True, True, True, True)

    def line(c: Sequence[str]) -> str:
        return "  ".join(x.rjust(widths[k]) if right[k] else x.ljust(widths[k]) for k, x in enumerate(c)).rstrip()

    lines.append(line(header))
    lines.extend(line(c) for c in cells)
    if summary.parameters_omitted:
        lines.append(f"({summary.parameters_omitted} more parameters left out of the final frame)")
    if summary.draws is None:
        lines.append("(no draws kept: the interval needs keep_draws=True)")
    return "\n".join(lines)


def save_draws(summary: "Summary", path: Union[str, Path]) -> Path:
    """Writes the draws the client received, by the file's suffix:

    * ``.csv``: a header ``chain,iteration,<names>``, then one draw per line
      in sequence order, values to 17 significant digits (exact round trip);
    * ``.npy``: NumPy format, one float64 array chains x draws x dim (every
      chain must have the same number of draws); the names are not in it;
    * ``.npz``: NumPy archive of ``values`` (draws x dim, in sequence
      order), ``chain`` and ``iteration`` (one entry per draw) and ``names``.

    Returns the path. Raises ValueError for another suffix or when no draws
    were kept."""
    path = Path(path)
    draws, chains, iters = summary.draws, summary.draw_chains, summary.draw_iterations
    if draws is None or chains is None or iters is None:
        raise ValueError("sluice_client: no draws kept (the session ran with keep_draws=False)")
    names = summary.draw_names()
    suffix = path.suffix.lower()
    if suffix == ".csv":
        with path.open("w", newline="", encoding="utf-8") as f:
            w = csv.writer(f, lineterminator="\n")
            w.writerow(["chain", "iteration", *names])
            for c, it, row in zip(chains.tolist(), iters.tolist(), draws):
                w.writerow([c, it, *(repr(float(v)) for v in row)])
    elif suffix == ".npy":
        np.save(path, summary.draws_by_chain())
    elif suffix == ".npz":
        np.savez(path, values=draws, chain=chains, iteration=iters, names=np.array(names, dtype=str))
    else:
        raise ValueError(f"sluice_client: cannot write {path.name!r}; want a .csv, .npy or .npz file")
    return path
