"""Phrases every view shares: durations, times, points, seed counts, titles, interval methods.

Pure functions of plain values (no pandas beyond reading a table's columns, no matplotlib), so
the terminal, the HTML page and the figures say the same thing the same way.
"""

from __future__ import annotations

import math
import time
from datetime import datetime, timezone
from pathlib import PurePath
from typing import Any

import pandas as pd

from periodscan.analysis.stats import SETTLE_CAP

PROXY_CAVEAT = ("Damage measured on a small proxy model is evidence, not a guarantee, for a "
                "production model: confirm on the real pipeline before relying on it.")
#: How a run that diverged or ended at chance accuracy is named in tables and notes.
DIVERGED_WORDS = "diverged or at chance level"


def human_duration(seconds: float) -> str:
    """'42 s', '3.5 min', '2.1 h'."""
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


def age(unix_seconds: float | None, now: float | None = None) -> str:
    """'3.5 min ago' for a Unix time, 'never' for None."""
    if unix_seconds is None:
        return "never"
    now = time.time() if now is None else now
    return f"{human_duration(max(now - unix_seconds, 0))} ago"


def iso_time(unix_seconds: float | None) -> str | None:
    """A Unix time as ISO 8601 in UTC with its offset ('2026-12-02T14:03:11+00:00')."""
    if unix_seconds is None or (isinstance(unix_seconds, float) and math.isnan(unix_seconds)):
        return None
    return datetime.fromtimestamp(float(unix_seconds), tz=timezone.utc).isoformat(
        timespec="seconds")


def local_time(unix_seconds: float) -> str:
    """'2026-12-02 15:03' in the machine's time zone, for terminal lines."""
    return time.strftime("%Y-%m-%d %H:%M", time.localtime(unix_seconds))


def points(value: float) -> str:
    """'1 point', '0.5 points'."""
    return f"{value:g} point" + ("" if value == 1 else "s")


def epoch_number(value: float) -> str:
    """An epoch that may be fractional (mapped onto a production schedule): '45', '7.5'."""
    return f"{value:.0f}" if float(value).is_integer() else f"{value:.1f}"


def more_seeds_phrase(extra: float | None) -> str:
    """A :func:`periodscan.analysis.stats.seeds_to_settle` answer in words."""
    if extra is None or (isinstance(extra, float) and math.isnan(extra)):
        return "unknown (no spread measured yet)"
    if math.isinf(extra):
        return f"more than {SETTLE_CAP} seeds in total"
    return f"about {int(extra)} more seed{'s' if int(extra) != 1 else ''}"


def short_name(target: Any) -> str:
    """The last part of a dotted ``_target_``: 'periodscan.deficits.Blur' -> 'Blur'."""
    return str(target or "?").rsplit(".", 1)[-1]


def dataset_name(data: dict[str, Any]) -> str:
    """A data set's name from its config block: its ``name`` (a torchvision data set), the file
    of ``path`` (npz arrays) or the folder of ``root`` (image folders), else the loader's name
    without ``load_`` ('load_mnist1d' -> 'mnist1d')."""
    if data.get("name"):
        return str(data["name"])
    for key in ("path", "root"):
        if data.get(key):
            return PurePath(str(data[key])).stem or str(data[key])
    loader = short_name(data.get("_target_"))
    return loader.removeprefix("load_") or loader


def deficit_name(config: dict[str, Any]) -> str:
    """'Blur' for the config's deficit, or 'blur, label_noise, crop' for a sweep of several
    deficits (``design.deficits``: option names, or blocks named by their target)."""
    listed = (config.get("design") or {}).get("deficits")
    if listed:
        return ", ".join(item if isinstance(item, str) else short_name(item.get("_target_"))
                         for item in listed)
    return short_name((config.get("deficit") or {}).get("_target_"))


def sweep_title(config: dict[str, Any]) -> str:
    """"Blur on mnist1d / CNN1d, sweep 'demo'" from a sweep's resolved config."""
    deficit = deficit_name(config)
    model = short_name((config.get("model") or {}).get("_target_"))
    title = f"{deficit} on {dataset_name(config.get('data') or {})} / {model}"
    return title + (f", sweep '{config['name']}'" if config.get("name") else "")


def window_count(n: int) -> str:
    return f"{n} window" + ("" if n == 1 else "s")


def interval_summary(table: pd.DataFrame) -> str:
    """'intervals: Student t (3 windows), BCa bootstrap (2 windows); sd floor applied to 1'.

    Counts the windows per interval method (the table's ``interval`` column); windows without
    bounds (one seed or none) are counted apart, and so are the t intervals whose zero spread
    was replaced by the floor of one test example.
    """
    bounded = table.damage_low.notna() if "damage_low" in table else pd.Series(True, table.index)
    methods = table.interval[bounded].astype(str)
    names = {"t": "Student t", "BCa bootstrap": "BCa bootstrap",
             "percentile bootstrap": "percentile bootstrap"}
    base = methods.str.replace(", sd floor", "", regex=False)
    counts = sorted(base.value_counts().items(), key=lambda item: (-item[1], item[0]))
    parts = [f"{names.get(m, m)} ({window_count(n)})" for m, n in counts]
    if (~bounded).any():
        parts.append(f"none ({window_count(int((~bounded).sum()))} with fewer than 2 seeds)")
    text = "intervals: " + (", ".join(parts) if parts else "none")
    floored = int(methods.str.endswith("sd floor").sum())
    if floored:
        text += f"; sd floor applied to {floored}"
    return text


def json_ready(value: Any) -> Any:
    """Plain JSON data: dict keys as str, numpy scalars as Python numbers, NaN/inf as null."""
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if hasattr(value, "item"):  # numpy scalars
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def epoch_list(values) -> str:
    """'0, 10, 20' for a list of starts or epochs."""
    return ", ".join(map(str, values))
