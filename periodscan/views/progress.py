"""A sweep's progress (:class:`periodscan.analysis.progress.SweepStatus`) as text and JSON."""

from __future__ import annotations

import dataclasses
import json
from typing import Any

from periodscan.analysis.progress import SweepStatus
from periodscan.views.words import age, human_duration, iso_time, local_time

#: Run states in the order a reader wants them counted.
ORDER = ("done", "diverged", "failed", "pending")
MAX_FAILURES = 10


def runs_detail(s: SweepStatus) -> str:
    """'18 done, 2 failed'."""
    by = s.runs_by_status
    return ", ".join(f"{by[k]} {k}" for k in ORDER if by.get(k))


def format_status(s: SweepStatus) -> str:
    """Where a sweep stands in a few lines: runs, epochs, speed, ETA, last result, failures."""
    lines = [f"sweep '{s.name}' at {s.folder}: {s.state}" + (f" ({s.owner})" if s.owner else ""),
             f"runs:   {s.runs_done} / {s.runs_total} finished ({runs_detail(s)})"]
    pct = 100 * s.epochs_done / s.epochs_total if s.epochs_total else 100.0
    lines.append(f"epochs: {s.epochs_done} / {s.epochs_total} trained ({pct:.0f}%)")
    if s.epochs_waiting_on_failures:
        lines.append(f"        {s.epochs_waiting_on_failures} epochs wait below failed segments; "
                     "rerun the sweep command to retry them")
    if s.seconds_per_epoch is not None:
        lines.append(f"speed:  {s.seconds_per_epoch:.2f} s per epoch measured, {s.workers} "
                     f"worker(s)")
    if s.eta_seconds:
        verb = "left" if s.state == "running" else "left if resumed"
        lines.append(f"ETA:    about {human_duration(s.eta_seconds)} {verb}")
    lines.append(f"last result: {age(s.last_update)}"
                 + (f" ({local_time(s.last_update)})" if s.last_update else ""))
    lines += [f"failed: {run_id}: {error}" for run_id, error in s.failures[:MAX_FAILURES]]
    if len(s.failures) > MAX_FAILURES:
        lines.append(f"... and {len(s.failures) - MAX_FAILURES} more failed runs")
    return "\n".join(lines)


def status_record(s: SweepStatus) -> dict[str, Any]:
    """The status as JSON-ready data; ``last_update`` as an ISO 8601 time (UTC), not Unix
    seconds."""
    record = dataclasses.asdict(s)
    record["last_update"] = iso_time(s.last_update)
    return record


def status_json(s: SweepStatus, indent: int | None = 2) -> str:
    """:func:`status_record` as a JSON string (what ``periodscan status --json`` prints)."""
    return json.dumps(status_record(s), indent=indent)
