"""Parameter constraints declared as data, checked by one function, rendered by one function.

Every config field periodscan reads itself is declared once, as a list of constraints any of
which may hold (scikit-learn's ``_parameter_constraints`` style)::

    {"epochs": [Interval(int, 1, None)], "tolerance": [Interval(float, 0, None), None]}

``check`` validates a block against such a table and ``bad_value`` renders every message in
one form: ``The 'schedule.epochs' parameter must be an int in the range [1, inf). Got 0
instead.``  Choices that code implements (optimizers, learning-rate schedules, executors) are
read from that code when a message is rendered, so the table never lists them twice.

Why a table rather than Hydra structured configs: data, model, deficit and monitor are user
``_target_`` calls whose fields we cannot know, and designs are plugins that declare their own
fields; a table per block keeps each rule next to the code that relies on it, and works on the
plain dicts that both the CLI and notebooks pass in.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from periodscan.errors import bad_value

__all__ = ["Interval", "ListOf", "Options", "Pattern", "Shown", "bad_value", "check", "check_value",
           "satisfies"]


class Shown(str):
    """A value already put into words: messages print it as is, without quotes."""

    def __repr__(self) -> str:
        return str(self)


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


@dataclass(frozen=True)
class Interval:
    """A number of ``kind`` (int or float) between ``low`` and ``high`` (None = unbounded)."""

    kind: type
    low: float | None
    high: float | None
    closed: str = "both"  # "both", "left", "right" or "neither"

    def holds(self, value: Any) -> bool:
        if not (_is_int(value) if self.kind is int else _is_number(value)):
            return False
        if isinstance(value, float) and not math.isfinite(value):
            return False
        left = self.closed in ("both", "left")
        right = self.closed in ("both", "right")
        if self.low is not None and (value < self.low or (value == self.low and not left)):
            return False
        return not (self.high is not None
                    and (value > self.high or (value == self.high and not right)))

    def __str__(self) -> str:
        left = "[" if self.closed in ("both", "left") and self.low is not None else "("
        right = "]" if self.closed in ("both", "right") and self.high is not None else ")"
        low = "-inf" if self.low is None else _show(self.low, self.kind)
        high = "inf" if self.high is None else _show(self.high, self.kind)
        noun = "an int" if self.kind is int else "a number"
        return f"{noun} in the range {left}{low}, {high}{right}"


def _show(bound: float, kind: type) -> str:
    return str(int(bound)) if kind is int else f"{bound:g}"


@dataclass(frozen=True)
class Options:
    """One of a set of strings; ``source`` reads them from the code that implements them."""

    values: tuple[str, ...] = ()
    source: Callable[[], Iterable[str]] | None = None

    def choices(self) -> tuple[str, ...]:
        return tuple(self.source()) if self.source is not None else self.values

    def holds(self, value: Any) -> bool:
        return isinstance(value, str) and value in self.choices()

    def __str__(self) -> str:
        return "one of " + ", ".join(repr(c) for c in self.choices())


@dataclass(frozen=True)
class Pattern:
    """A string matching ``regex`` in full; ``meaning`` says it in words."""

    regex: str
    meaning: str

    def holds(self, value: Any) -> bool:
        return isinstance(value, str) and re.fullmatch(self.regex, value) is not None

    def __str__(self) -> str:
        return self.meaning


@dataclass(frozen=True)
class ListOf:
    """A non-empty list whose items satisfy ``item``; ``distinct`` forbids repeats."""

    item: Any
    distinct: bool = False
    words: str = field(default="")

    def holds(self, value: Any) -> bool:
        if not isinstance(value, (list, tuple)) or not value:
            return False
        if self.distinct and len(set(value)) != len(value):
            return False
        return all(satisfies(v, [self.item]) for v in value)

    def __str__(self) -> str:
        repeats = " without repeats" if self.distinct else ""
        return self.words or f"a non-empty list{repeats} of {_describe(self.item)}s"


def _describe(constraint: Any) -> str:
    """Singular description of an item constraint, for list messages."""
    if isinstance(constraint, Interval):
        low = "" if constraint.low is None else f" >= {_show(constraint.low, constraint.kind)}"
        return ("int" if constraint.kind is int else "number") + low
    return str(constraint)


def satisfies(value: Any, constraints: list[Any]) -> bool:
    """True when any constraint holds (``None`` in the list admits None)."""
    for constraint in constraints:
        if constraint is None:
            if value is None:
                return True
        elif constraint.holds(value):
            return True
    return False


def allowed(constraints: list[Any]) -> str:
    """'an int in the range [1, inf) or None' for a constraint list."""
    return " or ".join("None" if c is None else str(c) for c in constraints)


def check_value(name: str, value: Any, constraints: list[Any]) -> Any:
    """Return ``value`` if it satisfies ``constraints``; raise the one-form ConfigError if not."""
    if not satisfies(value, constraints):
        raise bad_value(name, allowed(constraints), value)
    return value


def check(block: Mapping[str, Any], table: Mapping[str, list[Any]], prefix: str = "") -> None:
    """Check every field of ``table`` in ``block`` (a missing field counts as None).

    A nested table (a dict value) checks the nested block under ``prefix.field.``.
    """
    for name, constraints in table.items():
        value = block.get(name) if isinstance(block, Mapping) else None
        if isinstance(constraints, Mapping):
            check(value if isinstance(value, Mapping) else {}, constraints, f"{prefix}{name}.")
        else:
            check_value(f"{prefix}{name}", value, constraints)


# --- the tables of the blocks periodscan reads itself ----------------------------------------

def _optimizers() -> Iterable[str]:
    from periodscan.engine.schedule import OPTIMIZERS

    return OPTIMIZERS


def _lr_schedules() -> Iterable[str]:
    from periodscan.engine.schedule import LR_SCHEDULES

    return LR_SCHEDULES


def _devices() -> Iterable[str]:
    from periodscan.engine.device import DEVICES

    return DEVICES


def _executors() -> Iterable[str]:
    from periodscan.engine.executors import EXECUTORS

    return EXECUTORS


EPOCH = Interval(int, 0, None)
COUNT = Interval(int, 1, None)
#: A confidence level: verdicts and intervals need alpha = 1 - confidence in (0, 0.5].
CONFIDENCE = Interval(float, 0.5, 1.0, closed="left")
TOLERANCE = Interval(float, 0.0, None)

ROOT = {
    "name": [Pattern(r"[A-Za-z0-9_.\-]+", "a folder name of letters, digits, '.', '_' or '-'")],
    "seeds": [COUNT, ListOf(EPOCH, distinct=True,
                            words="a non-empty list of distinct ints >= 0")],
    "confidence": [CONFIDENCE],
    "tolerance": [TOLERANCE, None],
    "device": [Options(source=_devices), None],  # None (a config from before it existed): cpu
}

SCHEDULE = {
    "epochs": [COUNT],
    "batch_size": [COUNT],
    "optimizer": {
        "name": [Options(source=_optimizers), None],  # None with _target_ (check_recipe)
        "lr": [Interval(float, 0.0, None, closed="neither")],
        "momentum": [Interval(float, 0.0, 1.0), None],
        "weight_decay": [Interval(float, 0.0, None), None],
    },
    "lr_schedule": {
        "kind": [Options(source=_lr_schedules), None],  # None with lr_scheduler (check_recipe)
        "warmup_epochs": [EPOCH, None],
    },
    "augment": {"max_shift": [EPOCH, None]},
}

#: Fields a learning-rate schedule needs beyond SCHEDULE, by its kind.
LR_SCHEDULE_FIELDS = {
    "step": {"gamma": [Interval(float, 0.0, 1.0, closed="right")], "step_size": [COUNT]},
    "exponential": {"gamma": [Interval(float, 0.0, 1.0, closed="right")]},
}

EXECUTOR = {
    "kind": [Options(source=_executors)],
    "workers": [COUNT, None],
    "threads_per_worker": [COUNT, None],
    "address": [Pattern(r"[^:\s]*:[^\s]+", "a Dask scheduler address such as "
                                            "'tcp://host:8786' or 'host:8786'"), None],
}


def check_settings(plain: Mapping[str, Any]) -> None:
    """Root settings, schedule and executor of a plain config (designs check their own block)."""
    check(plain, ROOT)
    schedule = plain.get("schedule") or {}
    check(schedule, SCHEDULE, "schedule.")
    kind = (schedule.get("lr_schedule") or {}).get("kind")
    check(schedule.get("lr_schedule") or {}, LR_SCHEDULE_FIELDS.get(kind, {}),
          "schedule.lr_schedule.")
    from periodscan.engine.schedule import check_recipe

    check_recipe(schedule)
    check(plain.get("executor") or {}, EXECUTOR, "executor.")


def seed_list(plain: Mapping[str, Any]) -> list[int]:
    """``seeds`` is a count (seeds 0..n-1) or an explicit list of distinct ints >= 0."""
    seeds = check_value("seeds", plain.get("seeds"), ROOT["seeds"])
    return list(range(seeds)) if isinstance(seeds, int) else list(seeds)
