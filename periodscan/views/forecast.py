"""The forecast (a predicted critical window from the Fisher trace of the trunks) as text."""

from __future__ import annotations

import numpy as np

from periodscan.views.words import human_duration

BARS = "▁▂▃▄▅▆▇█"


def sparkline(values, width: int = 60) -> str:
    """The curve in block characters, averaged into at most ``width`` columns."""
    values = np.asarray(values, dtype=float)
    columns = np.array_split(values, min(width, len(values)))
    means = np.array([c.mean() for c in columns])
    low, high = np.nanmin(means), np.nanmax(means)
    scaled = (means - low) / (high - low) if high > low else np.zeros_like(means)
    return "".join(BARS[int(round(s * (len(BARS) - 1)))] for s in scaled)


def _curve_lines(outcome) -> list[str]:
    phase = outcome.phase
    low, high = phase.fraction
    trace = outcome.curve.trace.to_numpy()
    return [
        f"Fisher trace of the clean trunk (mean of {len(outcome.seeds)} seed(s)), "
        f"epochs 0-{len(trace) - 1}:",
        "  " + sparkline(trace),
        f"  peak at epoch {phase.peak}; above half its height over the floor in epochs "
        f"{phase.begin}-{phase.end - 1}",
        "",
        f"predicted critical window: epochs [{phase.begin}, {phase.end}) = "
        f"{100 * low:.0f}%-{100 * high:.0f}% of the {phase.epochs}-epoch schedule",
    ]


def _cost_line(outcome) -> str:
    retrained = (f"{outcome.epochs_trained} trunk epochs trained" if outcome.epochs_trained
                 else "trunks already in the folder, nothing trained")
    left = (f"{outcome.remaining_epochs} epochs, about "
            f"{human_duration(outcome.remaining_seconds)}, are left to train in this folder"
            if outcome.remaining_epochs else "the sweep is already complete in this folder")
    return (f"forecast took {human_duration(outcome.seconds)} ({retrained}); the full sweep "
            f"trains {outcome.sweep_epochs} epochs: about "
            f"{human_duration(outcome.sweep_seconds)} with {outcome.workers} worker(s) at "
            f"{outcome.seconds_per_epoch:.2f} s per epoch; {left}")


def format_forecast(outcome, sweep_command: str) -> str:
    """The forecast as text: curve, predicted window, per-window scores, time, and the command
    (``sweep_command``, as the user would type it) that measures the damage instead."""
    lines = [*_curve_lines(outcome), "", f"{'window':>12} {'Fisher share':>12}  at risk"]
    for row in outcome.scores.itertuples():
        window = f"[{row.start}, {row.start + row.length})"
        lines.append(f"{window:>12} {row.score:>12.3f}  {'yes' if row.at_risk else '-'}")
    lines += [
        "",
        _cost_line(outcome),
        "A forecast from the Fisher trace of a small proxy model is a hint, not a measurement; "
        "run the sweep to measure damage:",
        "  " + sweep_command,
    ]
    return "\n".join(lines)
