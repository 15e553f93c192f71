"""The latest-epoch answer (:class:`periodscan.analysis.onset_plan.EpochAnswer`) in words and
as JSON: onset sweeps (how late may the change be made?) and removal sweeps (how long may the
deficit, a curriculum say, last?)."""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass
from typing import Any

from periodscan.analysis import onset_plan as codes
from periodscan.analysis.onset_plan import DAMAGE, DELAY_COST, EpochAnswer, EpochRow
from periodscan.analysis.planner import Fact
from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.views.words import (
    DIVERGED_WORDS,
    PROXY_CAVEAT,
    epoch_list,
    epoch_number,
    json_ready,
    more_seeds_phrase,
    points,
)

MARKS = {SAFE: "within", CRITICAL: "BEYOND"}


@dataclass(frozen=True)
class Words:
    """How one kind of answer names its epochs, its judged value and its question."""

    epoch: str
    value: str
    subject: str
    question: str
    latest: str
    nothing: str
    judged: str


WORDS = {
    DELAY_COST: Words(
        epoch="onset", value="cost vs 0", subject="a change kept to the end of training",
        question="the latest epoch at which making the change costs at most {tol} more than "
                 "making it at epoch 0 (same seed)",
        latest="latest onset within tolerance",
        nothing="no onset after 0 is established within the tolerance: make the change at "
                "epoch 0, or measure earlier onsets or more seeds",
        judged="mean delay cost (onset-0 accuracy minus onset-t accuracy, same seed)"),
    DAMAGE: Words(
        epoch="until", value="damage", subject="a deficit from epoch 0 (a curriculum, say)",
        question="the latest epoch the deficit may last to with damage at most {tol} "
                 "against never having it",
        latest="may last until",
        nothing="no end epoch is established within the tolerance (measure earlier ends or "
                "more seeds)",
        judged="mean damage (baseline accuracy minus run accuracy, same seed)"),
}


def where(a: EpochAnswer, epoch: int) -> str:
    """'epoch 20 (33% of training; production epoch 60)'."""
    text = f"epoch {epoch} ({epoch / a.schedule_epochs:.0%} of training"
    if a.production_epochs is not None:
        text += f"; production epoch {epoch_number(a.production(epoch))}"
    return text + ")"


def _bounds(low: float, high: float) -> str:
    return f"[{low:+6.2f}, {high:+6.2f}]" if not math.isnan(low) else "(none)"


def _number(value: float) -> str:
    return f"{value:+9.2f}" if not math.isnan(value) else f"{'-':>9}"


def _row_line(a: EpochAnswer, r: EpochRow, reference: bool = False) -> str:
    notes = []
    if reference:
        mark, value, bounds, holm = "reference", f"{'0':>9}", "", ""
    else:
        mark = MARKS.get(r.verdict, "?")
        value, bounds, holm = _number(r.value), _bounds(r.low, r.high), _bounds(r.holm_low,
                                                                                r.holm_high)
        if r.verdict not in (SAFE, CRITICAL):
            notes.append("one seed cannot decide" if r.seeds < 2
                         else f"needs {more_seeds_phrase(r.more_seeds)}")
    if a.judged == DELAY_COST:
        notes.append(f"vs never {r.damage:+.2f} {_bounds(r.damage_low, r.damage_high)}")
    if r.short_recovery:
        notes.append(f"only {r.recovery_epochs} clean epochs after")
    return (f"{r.epoch:>5} {r.epoch / a.schedule_epochs:>8.0%} {r.seeds:>5} {value} "
            f"{bounds:>17} {holm:>17} {mark:>9}  {'; '.join(notes)}")


def _head(a: EpochAnswer) -> str:
    w = WORDS[a.judged]
    level = f"{a.confidence:.0%} interval"
    return (f"{w.epoch:>5} {'% of run':>8} {'seeds':>5} {w.value:>9} {level:>17} "
            f"{'Holm bounds':>17} {'verdict':>9}  note")


def summary_lines(a: EpochAnswer) -> list[str]:
    """The answer: the latest epoch, then which epochs are within, beyond or open."""
    w = WORDS[a.judged]
    if a.latest is not None:
        lines = [f"{w.latest}: {where(a, a.latest)}"]
    else:
        lines = [f"{w.latest}: none - {w.nothing}"]
    for label, verdicts in (("within tolerance", (SAFE,)), ("beyond tolerance", (CRITICAL,))):
        epochs = a.epochs_with(*verdicts)
        lines.append(f"{label}: " + (", ".join(map(str, epochs)) if epochs
                                     else "none established"))
    open_epochs = [r.epoch for r in a.rows if r.verdict not in (SAFE, CRITICAL)]
    if open_epochs:
        lines.append("undetermined: " + ", ".join(map(str, open_epochs)))
    ref = a.reference
    if ref is not None and ref.seeds:
        lines.append(f"making the change at epoch 0 against never: damage {ref.damage:+.2f} "
                     f"points ({a.confidence:.0%} interval {ref.damage_low:+.2f} to "
                     f"{ref.damage_high:+.2f}, {ref.seeds} seeds)")
    return lines


def format_epoch_plan(a: EpochAnswer) -> str:
    """The answer as a block of text: question, per-epoch table, summary, notes."""
    w = WORDS[a.judged]
    lines = [f"Plan for {w.subject} in sweep '{a.sweep}' ({a.schedule_epochs}-epoch "
             f"schedule), tolerance {points(a.tolerance)}, {a.confidence:.0%} confidence",
             "question: " + w.question.format(tol=points(a.tolerance))]
    head = _head(a)
    lines += ["", head, "-" * len(head)]
    if a.reference is not None:
        lines.append(_row_line(a, a.reference, reference=True))
    lines += [_row_line(a, r) for r in a.rows]
    lines += ["", *summary_lines(a), ""]
    lines += [f"note: {n}" for n in epoch_plan_notes(a)]
    return "\n".join(lines)



def fact_text(a: EpochAnswer, fact: Fact) -> str:
    """One fact of the answer in words."""
    w = WORDS[a.judged]
    phrase = {
        codes.NO_REFERENCE: lambda: (
            "No onset-0 run finished: the delay cost cannot be measured, so no onset is "
            "judged (rerun the sweep to finish the reference runs)."),
        codes.LATER_WITHIN: lambda: (
            f"Epoch(s) {epoch_list(fact.starts)} are within the tolerance but come after an epoch "
            "that is not; the answer takes only the leading stretch within the tolerance."),
        codes.SHORT_RECOVERY: lambda: (
            f"Epoch(s) {epoch_list(fact.starts)} leave little clean training after the deficit: "
            "their damage is partly a model that has not recovered yet."),
        codes.PRODUCTION_MAPPING: lambda: (
            f"Production mapping: epoch e of this {a.schedule_epochs}-epoch proxy is shown as "
            f"epoch e x {a.production_epochs}/{a.schedule_epochs}, assuming the effect scales "
            "with the fraction of training completed."),
        codes.FIXED_RECOVERY: lambda: (
            f"Damage was measured after {fact.count} clean epochs following each deficit "
            "(fixed_recovery budget), not at the end of the schedule."),
        codes.RUNS_LOST: lambda: (
            f"{fact.count} run(s) failed or are unfinished; they are not in the means and the "
            "seeds column shows what each answer rests on."),
        codes.RUNS_DIVERGED: lambda: (
            f"{fact.count} run(s) {DIVERGED_WORDS}; their final accuracy counts."),
        codes.UNDETERMINED: lambda: (
            f"{fact.count} epoch(s) undetermined at this tolerance; settling all of them would "
            f"likely take {more_seeds_phrase(fact.seeds)}."),
        codes.METHOD: lambda: (
            f"Verdicts: two-sided paired t test of the {w.judged} against the tolerance, "
            f"Holm-corrected over the {fact.count} judged epochs; an epoch the test rejects is "
            "decided in the direction of its mean: within = Holm upper bound below the "
            "tolerance, beyond = Holm lower bound above it. Epochs between measured ones are "
            "not judged."),
        codes.PROXY: lambda: PROXY_CAVEAT,
    }
    return phrase[fact.code]()


def epoch_plan_notes(a: EpochAnswer) -> list[str]:
    """Every fact of the answer in words."""
    return [fact_text(a, f) for f in a.facts]


def epoch_plan_record(a: EpochAnswer) -> dict[str, Any]:
    """The answer as plain JSON-ready data (NaN and infinity become null), notes in words."""
    record = json_ready(asdict(a))
    record["notes"] = epoch_plan_notes(a)
    return record


def epoch_plan_json(a: EpochAnswer, indent: int | None = 2) -> str:
    """:func:`epoch_plan_record` as a JSON string (what ``periodscan plan --json`` prints)."""
    return json.dumps(epoch_plan_record(a), indent=indent)

