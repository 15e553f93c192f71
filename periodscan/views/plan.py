"""The planner's answer (:class:`periodscan.analysis.planner.PlanAnswer`) in words and as JSON."""

from __future__ import annotations

import json
import math
from dataclasses import asdict
from typing import Any

from periodscan.analysis import planner as facts
from periodscan.analysis.planner import Fact, PlanAnswer, StartAnswer
from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.views.recovery import established_text, recovering_text, trend_note
from periodscan.views.tables import MARKS, open_note
from periodscan.views.words import (
    DIVERGED_WORDS,
    PROXY_CAVEAT,
    epoch_list,
    epoch_number,
    json_ready,
    more_seeds_phrase,
    points,
)


def where(a: PlanAnswer, start: int) -> str:
    """'epoch 15 (50% of training; production epoch 45)'."""
    text = f"epoch {start} ({start / a.schedule_epochs:.0%} of training"
    if a.production_epochs is not None:
        text += f"; production epoch {epoch_number(a.production(start))}"
    return text + ")"


def describe_stretch(a: PlanAnswer, group: list[int]) -> str:
    """'starts 0 to 10 (deficit epochs 0 to 25, 0% to 42% of training)' for critical starts."""
    first, last = group[0], group[-1]
    end = last + a.length_used
    starts = f"start {first}" if first == last else f"starts {first} to {last}"
    text = (f"{starts} (deficit epochs {first} to {end}, {first / a.schedule_epochs:.0%} to "
            f"{end / a.schedule_epochs:.0%} of training")
    if a.production_epochs is not None:
        text += (f"; production epochs {epoch_number(a.production(first))} to "
                 f"{epoch_number(a.production(end))}")
    text += ")"
    measured = [s for s in a.starts if s.start in group]
    if measured and all(s.short_recovery for s in measured):
        text += ", with little clean training after it"
    return text


def safe_from_line(a: PlanAnswer) -> str:
    if a.safe_from is not None:
        return f"{where(a, a.safe_from)} on, every measured later start is safe"
    block = a.blocking_start()
    why = f" (start {block.start} is {block.verdict})" if block else ""
    return f"no start from which every later measured start is safe{why}"


def best_line(a: PlanAnswer) -> tuple[str, str]:
    """(label, text) of the best safe slot, or of the least damaging start when none is safe."""
    b = a.best
    label = "best safe slot" if a.best_is_safe else "least damaging start (not established safe)"
    return label, (f"start {where(a, b.start)}, expected damage {b.damage:+.2f} points "
                   f"({a.confidence:.0%} interval {b.damage_low:+.2f} to {b.damage_high:+.2f}, "
                   f"{b.seeds} seeds)")


def plan_summary(a: PlanAnswer) -> list[str]:
    """The answer's lines: critical and safe starts, safe-from epoch, best slot."""
    out = []
    if a.critical_starts:
        out.append(f"critical starts: {', '.join(map(str, a.critical_starts))} - a deficit "
                   f"starting there does damage above {points(a.tolerance)}")
        out += [f"  critical window: {describe_stretch(a, g)}" for g in a.critical_stretches()]
    else:
        out.append("critical starts: none established")
    out.append("safe starts: " + (", ".join(map(str, a.safe_starts)) if a.safe_starts
                                  else "none established"))
    if a.undetermined_starts:
        out.append("undetermined: " + ", ".join(map(str, a.undetermined_starts)))
    out.append(f"safe from: {safe_from_line(a)}")
    if a.best is not None:
        label, text = best_line(a)
        out.append(f"{label}: {text}")
    if a.undetermined_starts and a.established is not None:
        out.append(f"established: {established_text(a.established, 'start')}")
    return out


def _start_line(s: StartAnswer, production: bool) -> str:
    bounds = (f"[{s.holm_low:+6.2f}, {s.holm_high:+6.2f}]" if not math.isnan(s.holm_low)
              else "(no interval)")
    damage = f"{s.damage:+7.2f}" if not math.isnan(s.damage) else f"{'-':>7}"
    notes = []
    if s.verdict not in (SAFE, CRITICAL):
        note = open_note(s.seeds, s.more_seeds, s.confirmed)
        notes += [note] if note else []
    if s.short_recovery:
        notes.append(f"only {s.recovery_epochs} clean epochs after")
    if s.trend is not None and s.trend.still_recovering:
        notes.append(trend_note(s.trend.slope, s.trend.fit_epochs))
    return (f"{s.start:>5} {s.start_frac:>8.0%}"
            + (f" {epoch_number(s.production_start):>11}" if production else "")
            + f" {s.seeds:>5} {damage} {bounds:>17} {MARKS.get(s.verdict, s.verdict):>12}"
            + f"  {'; '.join(notes)}")


def format_plan(a: PlanAnswer) -> str:
    """The answer as a readable block of text: per-start table, summary, notes."""
    prod = a.production_epochs is not None
    lines = [f"Plan for a {a.length_asked}-epoch deficit in sweep '{a.sweep}' "
             f"({a.schedule_epochs}-epoch schedule), tolerance {points(a.tolerance)}, "
             f"{a.confidence:.0%} confidence"]
    if not a.length_measured:
        lines.append(f"  ! a {a.length_asked}-epoch deficit was not measured: answering from the "
                     f"nearest longer measured length, {a.length_used} epochs (conservative)")
    head = (f"{'start':>5} {'% of run':>8}" + (f" {'prod. epoch':>11}" if prod else "")
            + f" {'seeds':>5} {'damage':>7} {a.bounds_title:>17} {'verdict':>12}  note")
    lines += ["", head, "-" * len(head)]
    lines += [_start_line(s, prod) for s in a.starts]
    lines += ["", *plan_summary(a), ""]
    lines += [f"note: {n}" for n in plan_notes(a)]
    return "\n".join(lines)



def fact_text(a: PlanAnswer, fact: Fact) -> str:
    """One fact of the answer in words."""
    if fact.code == facts.STILL_RECOVERING:
        return " ".join(recovering_text(s.start, s.trend, a.confidence) for s in a.starts
                        if s.start in fact.starts and s.trend is not None)
    phrase = {
        facts.LENGTH_SUBSTITUTED: lambda: (
            f"A {a.length_asked}-epoch deficit was not measured; this answer uses the nearest "
            f"longer measured length, {a.length_used} epochs, assuming a longer deficit at the "
            f"same start does at least as much damage (conservative). Starts after epoch "
            f"{fact.starts[0]} were not measured for it."),
        facts.SHORT_RECOVERY: lambda: (
            f"Start(s) {epoch_list(fact.starts)} leave little clean training after the deficit: "
            "their damage is partly a model that has not yet recovered, which still matters if "
            "training is not extended."),
        facts.PRODUCTION_MAPPING: lambda: _production_text(a),
        facts.FIXED_RECOVERY: lambda: (
            f"Damage was measured after {fact.count} clean epochs following each window "
            "(fixed_recovery budget), not at the end of the schedule."),
        facts.RUNS_LOST: lambda: (
            f"{fact.count} window run(s) failed or are unfinished; they are not in the means "
            "and the seeds column shows what each answer rests on."),
        facts.RUNS_DIVERGED: lambda: (
            f"{fact.count} window run(s) {DIVERGED_WORDS}; their final accuracy counts as "
            "damage."),
        facts.BASELINES_DIVERGED: lambda: (
            f"Start(s) {epoch_list(fact.starts)} are compared with baseline run(s) that "
            f"{DIVERGED_WORDS}: their damage is measured against a broken baseline."),
        facts.SCREENED: lambda: (
            f"Start(s) {epoch_list(fact.starts)} were screened on their first seeds (their mean "
            "told the search which way to go) and are not confirmed; only starts measured at "
            "the seed cap get verdicts, so no data-dependent stopping enters a verdict. Starts "
            "between measured ones are assumed to follow the measured trend."),
        facts.UNDETERMINED: lambda: (
            f"{fact.count} start(s) undetermined at this tolerance; settling all of them would "
            f"likely take {more_seeds_phrase(fact.seeds)}."),
        facts.METHOD: lambda: _method_text(fact.count),
        facts.SEQUENTIAL: lambda: _sequential_text(fact),
        facts.FUTILE: lambda: (
            f"Start(s) {epoch_list(fact.starts)} were stopped early as undetermined: with "
            "their observed mean and spread, the test at the last stage would be unlikely to "
            "decide them (conditional power below design.futility)."),
        facts.IMPLIED: lambda: (
            f"Start(s) {epoch_list(fact.starts)} were not trained: their verdict is implied by "
            "the measured starts on either side, which agree, or in a severity sweep by a milder "
            "level found critical or a harsher one found safe at the same start (damage "
            "assumed monotone between them)."),
        facts.FRESH_SEEDS: lambda: _fresh_seeds_text(a, fact),
        facts.PROXY: lambda: PROXY_CAVEAT,
    }
    return phrase[fact.code]()


def _fresh_seeds_text(a: PlanAnswer, fact: Fact) -> str:
    first, n = int(fact.count or 0), int(fact.seeds or 0)
    seeds = ",".join(str(first + i) for i in range(n))
    return (f"To settle start(s) {epoch_list(fact.starts)}, measure them on fresh seeds: the "
            "seeds this sweep has already tested would not give an independent test. For "
            f"example, with this sweep's other settings and a new name: periodscan sweep "
            f"design=window 'design.starts=[{','.join(map(str, fact.starts))}]' "
            f"'design.lengths=[{a.length_used}]' 'seeds=[{seeds}]' name=...")


def _production_text(a: PlanAnswer) -> str:
    n, p, length = a.schedule_epochs, a.production_epochs, a.length_used
    return (f"Production mapping: epoch e of this {n}-epoch proxy is shown as epoch e x {p}/{n} "
            f"of the production schedule, and the {length}-epoch window as {length * p / n:g} "
            "production epochs. This assumes sensitivity scales with the fraction of training "
            "completed.")


def _sequential_text(fact) -> str:
    """How a group-sequential answer was judged: Holm's even shares or the bisection's."""
    if fact.starts:
        sharing = (f"alpha is shared over all {fact.count} candidate starts of the design's grid "
                   f"as the search goes: the first pass's starts ({epoch_list(fact.starts)}) "
                   "hold it in equal parts, and a decided start passes its share to the starts "
                   "the bisection measures next beside it (a graphical multiple-test procedure; "
                   "starts never measured are never rejected)")
    else:
        sharing = (f"Holm's correction runs over all {fact.count} candidate starts of the "
                   "design's grid (unmeasured ones never rejected), a decided start passing its "
                   "level on to the others")
    return ("Verdicts: group-sequential two-sided paired t tests of mean damage against the "
            f"tolerance. Seeds were added in stages up to {fact.seeds:g}; at each stage a start "
            f"is compared with an alpha-spending boundary, and {sharing}. A start is decided at "
            "the first stage that crosses, in the direction of its mean, and gets no more seeds.")


def _method_text(holm_family: int | None) -> str:
    family = ("over the starts of this length" if holm_family is None else
              f"over all {holm_family} candidate starts of the design's grid (unmeasured ones "
              "count with p = 1)")
    return (f"Verdicts: two-sided paired t test of mean damage against the tolerance, "
            f"Holm-corrected {family}; a start it rejects is decided in the direction of its "
            "mean: safe = Holm upper bound below the tolerance, critical = Holm lower bound "
            "above it. Only measured starts are judged; starts in between are not.")


def plan_notes(a: PlanAnswer, *, skip: tuple[str, ...] = ()) -> list[str]:
    """Every fact of the answer in words, leaving out the codes in ``skip``."""
    return [fact_text(a, f) for f in a.facts if f.code not in skip]


def plan_record(a: PlanAnswer) -> dict[str, Any]:
    """The answer as plain JSON-ready data.

    NaN and infinity become null. ``more_seeds`` is a number of extra seeds or null (decided,
    unknown, or more than the search cap); ``more_seeds_text`` says it in words for every
    start without a verdict (null for decided ones). ``facts``
    keeps the notes as codes and numbers, ``notes`` as sentences.
    """
    record = json_ready(asdict(a))
    for start, out in zip(a.starts, record["starts"], strict=True):
        decided = start.verdict in (SAFE, CRITICAL)
        out["more_seeds_text"] = None if decided else more_seeds_phrase(start.more_seeds)
    record["notes"] = plan_notes(a)
    return record


def plan_json(a: PlanAnswer, indent: int | None = 2) -> str:
    """:func:`plan_record` as a JSON string (what ``periodscan plan --json`` prints)."""
    return json.dumps(plan_record(a), indent=indent)

