"""The progress history of a session on disk, as JSON lines: one object
per progress report and a last one when the session ends, with the keys
docs/report.md lists (the file `sluice demo` writes beside its draws, which
`sluice report` reads). Standard library only: no plotting here."""

from __future__ import annotations

import json
import math
import os
from typing import IO, Any, Dict, List, Optional, Sequence, Union

from ._types import Check, Progress, Summary

#: Kinds of record.
KIND_PROGRESS = "progress"
KIND_FINISH = "finish"


def _num(x: float) -> Optional[float]:
    """A figure, or None (JSON null) when it is not finite."""
    return float(x) if math.isfinite(x) else None


def history_record(
    p: Progress,
    kind: str = KIND_PROGRESS,
    reason: str = "",
    message: str = "",
    checks: Optional[Sequence[Check]] = None,
) -> Dict[str, Any]:
    """One line of the history for progress report ``p`` (``kind``
    "progress", or "finish" with the session's reason and message), with
    the verdict ``checks`` (by default the report's own, ``p.checks``)."""
    rec: Dict[str, Any] = {
        "kind": kind,
        "state": p.state.value if p.state.value != "unspecified" else "",
        "steps": p.steps,
        "evals_used": p.evaluations_used,
        "evals_left": p.evaluations_left,
        "elapsed_s": p.seconds_used,
        "time_left_s": p.seconds_left if p.seconds_left >= 0 else -1,
        "draws_sent": p.draws_sent,
    }
    if not rec["state"]:
        del rec["state"]
    params: List[Dict[str, Any]] = [
        {"name": d.name, "rhat": _num(d.rhat), "ess_bulk": _num(d.bulk_ess), "ess_tail": _num(d.tail_ess)}
        for d in p.parameters
    ]
    if params:
        rec["params"] = params
    rhats = [d.rhat for d in p.parameters if math.isfinite(d.rhat)]
    ess = [e for d in p.parameters for e in (d.bulk_ess, d.tail_ess) if math.isfinite(e)]
    rec["worst_rhat"] = max(rhats) if rhats else None
    rec["least_ess"] = min(ess) if ess else None
    if p.ksd >= 0:
        rec["stein"] = {"value": _num(p.ksd), "se": None, "upper": None}
    if p.bound is not None:
        rec["bound"] = {
            "metric": p.bound.metric,
            "value": _num(p.bound.value),
            "guaranteed": p.bound.guaranteed,
            "label": p.bound.label,
        }
    if p.targets:
        rec["targets"] = [
            {
                "name": t.name,
                "want": _num(t.want),
                "current": _num(t.current),
                "met": t.met,
                "projected_evaluations": t.projected_evaluations,
            }
            for t in p.targets
        ]
    verdict = p.checks if checks is None else checks
    if verdict:
        rec["checks"] = [
            {"name": c.name, "status": c.status.value, "figure": _num(c.figure), "sentence": c.message} for c in verdict
        ]
    if reason:
        rec["reason"] = reason
    if message:
        rec["message"] = message
    return rec


class HistoryWriter:
    """Writes a session's progress history, one JSON object per line, each
    line flushed as it is written (a reader can follow the file while the
    run goes on)::

        with sc.HistoryWriter("draws.csv.history.jsonl") as h:
            summary = sc.run(target, spec, grad, on_progress=h.write)
            h.finish(summary)
        summary.save("draws.csv")          # then: sluice report draws.csv

    ``target`` is a path (created or truncated) or an open text file
    (left open by :meth:`close`).
    """

    def __init__(self, target: Union[str, "os.PathLike[str]", IO[str]]) -> None:
        if isinstance(target, (str, os.PathLike)):
            self._f: IO[str] = open(target, "w", encoding="utf-8")
            self._own = True
        else:
            self._f = target
            self._own = False

    def write(self, p: Progress) -> None:
        """Appends a progress report."""
        self._line(history_record(p))

    def finish(self, s: Summary) -> None:
        """Appends the session's last record: its final report with the
        reason, the message and the session's verdict."""
        self._line(history_record(s.progress, KIND_FINISH, s.reason.value, s.message, s.checks))

    def _line(self, rec: Dict[str, Any]) -> None:
        self._f.write(json.dumps(rec, allow_nan=False, separators=(",", ":")) + "\n")
        self._f.flush()

    def close(self) -> None:
        """Closes the file if the writer opened it. Idempotent."""
        if self._own and not self._f.closed:
            self._f.close()

    def __enter__(self) -> "HistoryWriter":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
