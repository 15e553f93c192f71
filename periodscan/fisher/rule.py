"""The forecast rule: from a Fisher-trace curve to a predicted critical window and scores.

Pure functions on arrays, so the rule can be read and tested apart from any training.

The rule (our choice, checked against measured sweeps by benchmarks/forecast_validation.py):

1. Average the ``fisher/total`` readings over seeds, epoch by epoch (epochs between readings,
   when the monitor probes every k epochs, are filled by linear interpolation).
2. Smooth the mean with a centred moving average ``2 * (epochs // 20) + 1`` epochs wide, and
   take its highest point as the peak.
3. The predicted critical window is the run of epochs around the peak in which the smoothed
   trace stays at or above half its height over the floor (the lowest smoothed value):
   ``floor + 0.5 * (peak - floor)``. It is the phase in which the information in the weights
   rises to its peak and falls back.
4. A deficit window ``[s, s + length)`` gets the score: its share of the total trace summed
   over all epochs (the unsmoothed mean); it is "at risk" when it overlaps the critical window.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.ndimage import uniform_filter1d

HALF = 0.5


@dataclass(frozen=True)
class Phase:
    """The predicted critical window ``[begin, end)`` and the peak inside it (epochs)."""

    begin: int
    end: int
    peak: int
    threshold: float  # smoothed trace level that bounds the window
    epochs: int  # length of the schedule

    @property
    def fraction(self) -> tuple[float, float]:
        """``[begin, end)`` as fractions of the schedule."""
        return self.begin / self.epochs, self.end / self.epochs


def mean_curve(readings: pd.DataFrame, epochs: int) -> np.ndarray:
    """Mean over seeds of one reading per epoch ``0 .. epochs-1``.

    ``readings`` has columns seed, epoch, value (one name only). Each seed's series is
    interpolated linearly onto every epoch (held flat beyond its first and last reading).
    """
    grid = np.arange(epochs)
    curves = []
    for _, group in readings.groupby("seed"):
        group = group.sort_values("epoch")
        finite = np.isfinite(group.value.to_numpy())
        if finite.any():
            curves.append(np.interp(grid, group.epoch.to_numpy()[finite],
                                    group.value.to_numpy()[finite]))
    if not curves:
        raise ValueError("no finite readings to average")
    return np.mean(curves, axis=0)


def smoothing_width(epochs: int) -> int:
    """Moving-average width of step 2: about a tenth of the schedule, odd, at least 1."""
    return 2 * (epochs // 20) + 1


def critical_phase(curve: np.ndarray, level: float = HALF, width: int | None = None,
                   epochs: int | None = None) -> Phase:
    """Steps 2-3 of the rule; ``epochs`` is the schedule's length (default: the curve's)."""
    curve = np.asarray(curve, dtype=float)
    width = smoothing_width(len(curve)) if width is None else width
    smooth = uniform_filter1d(curve, size=width, mode="nearest")
    peak = int(np.argmax(smooth))
    floor = float(smooth.min())
    threshold = floor + level * (float(smooth[peak]) - floor)
    begin = peak
    while begin > 0 and smooth[begin - 1] >= threshold:
        begin -= 1
    end = peak + 1
    while end < len(smooth) and smooth[end] >= threshold:
        end += 1
    return Phase(begin, end, peak, threshold, len(curve) if epochs is None else epochs)


def window_scores(curve: np.ndarray, windows: Sequence[tuple[int, int]],
                  phase: Phase) -> pd.DataFrame:
    """Step 4: share of the summed trace inside each window, and overlap with the phase."""
    curve = np.asarray(curve, dtype=float)
    total = curve.sum()
    rows = []
    for start, length in windows:
        stop = min(start + length, len(curve))
        overlap = max(0, min(stop, phase.end) - max(start, phase.begin))
        rows.append({"start": start, "length": length,
                     "score": curve[start:stop].sum() / total if total > 0 else np.nan,
                     "overlap": overlap, "at_risk": overlap > 0})
    return pd.DataFrame(rows, columns=["start", "length", "score", "overlap", "at_risk"])
