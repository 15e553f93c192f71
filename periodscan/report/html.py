"""Render the report page: one self-contained HTML file (styles inline, images as data URIs).

The page answers in the order a reader asks: what was measured, the answer (critical window,
safe slots), the evidence (figures, table), how healthy the runs were, the config and the
command that reproduces the sweep, and the caveats.
"""

from __future__ import annotations

import html
import math
import time

import pandas as pd
import yaml

from periodscan.analysis.stats import BOOTSTRAP_MIN_SEEDS
from periodscan.analysis.verdicts import describe_more_seeds
from periodscan.planner import PROXY_CAVEAT
from periodscan.terminal import describe_stretch, row_notes

STYLE = """
body{font-family:"DejaVu Sans",Helvetica,Arial,sans-serif;color:#22262a;background:#f4f2ec;
 margin:0;line-height:1.45;font-size:15px}
main{max-width:1060px;margin:0 auto;padding:28px 32px 60px;background:#fffdf8;
 border-left:1px solid #e2ddd0;border-right:1px solid #e2ddd0}
h1{font-size:25px;margin:0 0 4px;color:#14313b}
h2{font-size:18px;margin:34px 0 10px;padding-bottom:4px;border-bottom:2px solid #1b6f8a;
 color:#14313b}
h3{font-size:15px;margin:18px 0 6px}
.sub{color:#5a5f63;margin:0 0 16px}
.caveat{background:#fff4d6;border-left:5px solid #d9a400;padding:10px 14px;margin:14px 0}
.partial{background:#fde8e4;border-left:5px solid #b8322a;padding:10px 14px;margin:14px 0}
.answer{display:grid;grid-template-columns:190px 1fr;gap:4px 14px;margin:8px 0 4px}
.answer dt{font-weight:bold;color:#3b4247}.answer dd{margin:0}
.critical{color:#b8322a;font-weight:bold}.safe{color:#2e7d4f;font-weight:bold}
.undetermined{color:#6b6b6b}
table{border-collapse:collapse;font-size:12.5px;margin:6px 0 10px;width:100%}
th{background:#e8eef0;text-align:right;padding:5px 6px;border-bottom:1px solid #b9c6cb;
 white-space:nowrap}
td{padding:4px 6px;border-bottom:1px solid #ebe7dd;text-align:right;white-space:nowrap}
td.l,th.l{text-align:left;white-space:normal}
td.n{min-width:150px}
.scroll{overflow-x:auto}
tr.v-critical td:first-child{border-left:5px solid #b8322a}
tr.v-safe td:first-child{border-left:5px solid #2e7d4f}
tr.v-undetermined td:first-child{border-left:5px solid #c9c9c9}
img{max-width:100%;border:1px solid #e2ddd0;background:white;margin:6px 0}
pre{background:#22262a;color:#f1efe8;padding:10px 14px;overflow-x:auto;font-size:13px;
 border-radius:3px;white-space:pre-wrap;word-break:break-all}
details pre{background:#f0ede4;color:#22262a}
.fig-note{color:#5a5f63;font-size:13px;margin:0 0 12px}
ul{padding-left:22px}li{margin:3px 0}
footer{color:#7a7f83;font-size:12px;margin-top:36px}
"""


def _e(value) -> str:
    return html.escape(str(value))


def _num(value, fmt: str = "{:+.2f}") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "&ndash;"
    return fmt.format(value)


def _short(target) -> str:
    return str(target or "?").rsplit(".", 1)[-1]


def _params(node: dict) -> str:
    items = [f"{k}={v}" for k, v in (node or {}).items() if k != "_target_" and v is not None]
    return ", ".join(items)


def _config_rows(config: dict) -> list[tuple[str, str]]:
    sched = config.get("schedule") or {}
    opt = sched.get("optimizer") or {}
    lrs = sched.get("lr_schedule") or {}
    design = config.get("design") or {}
    rows = []
    for group in ("deficit", "data", "model"):
        node = config.get(group) or {}
        rows.append((group, f"{_short(node.get('_target_'))} ({_params(node)})"))
    rows.append(("schedule", f"{sched.get('epochs')} epochs, batch {sched.get('batch_size')}, "
                             f"{opt.get('name')} lr {opt.get('lr')} momentum "
                             f"{opt.get('momentum')} weight decay {opt.get('weight_decay')}, "
                             f"{lrs.get('kind')} lr schedule"))
    if design.get("kind") == "removal":
        rows.append(("design", f"removal: deficit from epoch 0 until {design.get('until')}"))
    else:
        rows.append(("design", f"windows: starts {design.get('starts')}, lengths "
                               f"{design.get('lengths')}"))
    budget = design.get("budget")
    if budget == "fixed_recovery":
        budget += f" ({design.get('recovery_epochs')} clean epochs after each window)"
    rows.append(("budget", str(budget)))
    rows.append(("seeds", str(config.get("seeds"))))
    rows.append(("tolerance / confidence",
                 f"{config.get('tolerance')} points / {config.get('confidence')}"))
    executor = config.get("executor") or {}
    workers = executor.get("workers") or "one per core"
    rows.append(("executor", f"{executor.get('kind')}, workers: {workers}, "
                             f"{executor.get('threads_per_worker')} torch thread(s) each"))
    return rows


def _job(view) -> str:
    c = view.config
    design = c.get("design") or {}
    deficit = _short((c.get("deficit") or {}).get("_target_"))
    if design.get("kind") == "removal":
        what = f"switched on from epoch 0 until each of epochs {design.get('until')}"
    else:
        what = (f"switched on for {', '.join(map(str, design.get('lengths', [])))} epoch(s) "
                f"starting at each of epochs {design.get('starts')}")
    return (f"How much lasting damage does a temporary <b>{_e(deficit)}</b> deficit do when it is "
            f"{_e(what)} of a {view.schedule_epochs}-epoch schedule? Each run is compared with "
            "a clean baseline of the same seed on the same held-out examples: damage = baseline "
            "accuracy &minus; run accuracy, in accuracy points.")


def _plan_block(plan) -> str:
    def starts(values, css):
        if not values:
            return '<span class="undetermined">none established</span>'
        return f'<span class="{css}">{_e(", ".join(map(str, values)))}</span>'

    prod = plan.production_epochs is not None
    rows = [("critical starts", starts(plan.critical_starts, "critical"))]
    for group in plan.critical_stretches():
        rows.append(("critical window", _e(describe_stretch(plan, group))))
    rows.append(("safe starts", starts(plan.safe_starts, "safe")))
    if plan.undetermined_starts:
        rows.append(("undetermined", starts(plan.undetermined_starts, "undetermined")))
    if plan.safe_from is not None:
        where = (f"epoch {plan.safe_from} ({plan.safe_from / plan.schedule_epochs:.0%} of "
                 "training" + (f"; production epoch {plan.production(plan.safe_from):g}"
                               if prod else "") + ")")
        rows.append(("safe from", f"{_e(where)} on, every measured later start is safe"))
    else:
        block = plan.blocking_start()
        why = f" (start {block.start} is {block.verdict})" if block else ""
        rows.append(("safe from", "no start from which every later measured start is safe"
                     + _e(why)))
    if plan.best is not None:
        b = plan.best
        label = "best slot" if plan.best_is_safe else "least damaging start"
        extra = "" if plan.best_is_safe else " (not established safe)"
        rows.append((label, f"start {b.start}: expected damage {b.damage:+.2f} points "
                            f"({plan.confidence:.0%} interval {b.damage_low:+.2f} to "
                            f"{b.damage_high:+.2f}, {b.seeds} seeds){_e(extra)}"))
    body = "".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in rows)
    head = f"{plan.length_used}-epoch deficit"
    if not plan.length_measured:
        head = f"{plan.length_asked}-epoch deficit (answered from {plan.length_used} epochs)"
    notes = [n for n in plan.notes if n != PROXY_CAVEAT and not n.startswith("Verdicts:")]
    note_html = "".join(f"<li>{_e(n)}</li>" for n in notes)
    return (f"<h3>{_e(head)}</h3><dl class='answer'>{body}</dl>"
            + (f"<ul class='fig-note'>{note_html}</ul>" if note_html else ""))


def _table_html(table: pd.DataFrame, removal: bool, epochs: int) -> str:
    level = int(round(100 * table.confidence.iloc[0]))
    heads = ["window", "ends at" if removal else "start", "seeds", "baseline %", "run %",
             "damage", f"{level}% interval", "Holm bounds", "verdict", "McNemar differs",
             "notes"]
    out = ["<div class='scroll'><table><tr>" + "".join(
        f"<th class='l'>{h}</th>" if h in ("window", "notes") else f"<th>{h}</th>"
        for h in heads) + "</tr>"]
    for row in table.itertuples():
        window = (f"until {row.start + row.length}" if removal
                  else f"[{row.start}, {row.start + row.length})")
        interval = (f"{_num(row.damage_low)} to {_num(row.damage_high)}"
                    if pd.notna(row.damage_low) else "&ndash;")
        holm = (f"{_num(row.holm_low)} to {_num(row.holm_high)}"
                if pd.notna(row.holm_low) else "&ndash;")
        mcn = (f"{row.mcnemar_differ} of {row.mcnemar_tested}"
               if getattr(row, "mcnemar_tested", 0) else "&ndash;")
        where = row.start + row.length if removal else row.start
        cells = [window, f"{where} ({where / epochs:.0%})" if removal else
                 f"{row.start} ({row.start_frac:.0%})", row.seeds,
                 _num(row.baseline_acc, "{:.2f}"), _num(row.run_acc, "{:.2f}"),
                 _num(row.damage), interval, holm,
                 f"<span class='{row.verdict}'>{row.verdict}</span>", mcn,
                 _e("; ".join(row_notes(row)))]
        classes = {0: "l", len(cells) - 1: "l n"}
        tds = "".join(f"<td class='{classes[i]}'>{c}</td>" if i in classes else f"<td>{c}</td>"
                      for i, c in enumerate(cells))
        out.append(f"<tr class='v-{row.verdict}'>{tds}</tr>")
    out.append("</table></div>")
    return "".join(out)


def _health(status, table: pd.DataFrame) -> str:
    by = status.runs_by_status
    parts = [f"{by.get(k, 0)} {k}" for k in ("done", "diverged", "failed", "pending")
             if by.get(k)]
    items = [f"{status.runs_done} of {status.runs_total} runs finished ({', '.join(parts)}); "
             f"{status.epochs_done} of {status.epochs_total} epochs trained."]
    if len(table) and table.diverged.sum():
        items.append(f"{int(table.diverged.sum())} window run(s) diverged; they count in the "
                     "means with the accuracy they ended at.")
    if len(table) and (table.failed.sum() or table.unfinished.sum()):
        items.append(f"{int(table.failed.sum() + table.unfinished.sum())} window run(s) failed "
                     "or are unfinished: left out of the means, counted in the table notes.")
    for run_id, error in status.failures[:12]:
        items.append(f"failed: {run_id}: {error}")
    return "<ul>" + "".join(f"<li>{_e(i)}</li>" for i in items) + "</ul>"


def _reproduce(view) -> str:
    folder = view.folder
    if view.command:
        return (f"<p>The sweep was started with this command; rerunning it resumes or, in a "
                f"fresh results folder, repeats the sweep:</p><pre>{_e(view.command)}</pre>")
    return ("<p>The sweep was started from Python, so no command was recorded. Its resolved "
            "config (below) reproduces it; as it stands the call resumes this folder, and with "
            "<code>results_dir</code> set to a fresh folder it repeats the sweep:</p>"
            "<pre>import yaml, periodscan\n"
            f"config = yaml.safe_load(open({str(folder / 'config.yaml')!r}))\n"
            "periodscan.run_sweep(config)</pre>")


def _method(view, table: pd.DataFrame) -> str:
    methods = ", ".join(sorted(set(table.interval))) if len(table) else "none"
    items = [
        f"Intervals: Student-t for fewer than {BOOTSTRAP_MIN_SEEDS} seeds, BCa bootstrap "
        f"(scipy.stats.bootstrap) from {BOOTSTRAP_MIN_SEEDS} on; used here: {methods}. The "
        "seeds column says how many seeds each number rests on.",
        "Verdicts: for each window, the paired t test of mean damage against the tolerance; "
        "Holm's correction over the windows of one length (every window of a removal design). "
        "Critical = damage significantly above the tolerance (Holm lower bound above it); safe "
        "= significantly below (Holm upper bound below it); everything else is undetermined. "
        "A window with one seed is never decided, and a wide interval never makes a window "
        "safe.",
        "More seeds: for undetermined windows, the seeds at which the t bound at the "
        "Bonferroni level would likely clear the tolerance, if mean and spread stay as "
        "measured (" + describe_more_seeds(math.inf) + " is reported as such).",
        "McNemar: each window run against its baseline of the same seed, example by example on "
        "the shared test set (exact binomial below 25 discordant examples, chi-square with "
        "continuity correction above); the column counts seeds whose two models differ at the "
        "unadjusted level.",
        "Diverged runs count with the accuracy they ended at; failed and unfinished runs are "
        "left out of means and counted in the notes.",
        "Starts are also given as a fraction of the schedule; mapping them onto a longer "
        "production schedule assumes sensitivity scales with the fraction of training.",
        PROXY_CAVEAT,
    ]
    return "<ul>" + "".join(f"<li>{_e(i)}</li>" for i in items) + "</ul>"


def render_page(*, view, table: pd.DataFrame, plans: list, images: dict[str, str],
                status, title: str, has_fisher: bool = False, finished: bool = True) -> str:
    """The whole page as one string."""
    removal = view.is_removal
    parts = [f"<h1>periodscan report: {_e(view.name)}</h1>",
             f"<p class='sub'>{_e(title)} &middot; written "
             f"{time.strftime('%Y-%m-%d %H:%M')} &middot; {_e(view.folder)}</p>",
             f"<p>{_job(view)}</p>",
             f"<div class='caveat'>{_e(PROXY_CAVEAT)}</div>"]
    if status.state not in ("finished",):
        parts.append(f"<div class='partial'>Sweep state: <b>{_e(status.state)}</b>. "
                     f"{status.runs_done} of {status.runs_total} runs finished: the numbers "
                     "below are partial.</div>")
    if len(table) and finished:
        tol, conf = table.tolerance.iloc[0], table.confidence.iloc[0]
        parts.append(f"<h2>Answer at a tolerance of {tol:g} points, {conf:.0%} confidence</h2>")
        if plans:
            parts += [_plan_block(p) for p in plans]
        else:
            ends = table.start + table.length
            crit = ", ".join(f"until {e}" for e in ends[table.verdict == "critical"])
            safe = ", ".join(f"until {e}" for e in ends[table.verdict == "safe"])
            parts.append(f"<dl class='answer'><dt>critical</dt><dd>"
                         f"{_e(crit or 'none established')}</dd><dt>safe</dt><dd>"
                         f"{_e(safe or 'none established')}</dd></dl>")
    else:
        parts.append("<h2>Answer</h2><p>No window run has finished yet.</p>")
    if "sensitivity" in images:
        parts.append("<h2>Sensitivity</h2>"
                     f"<img alt='sensitivity curve' src='data:image/png;base64,"
                     f"{images['sensitivity']}'>"
                     "<p class='fig-note'>Mean damage per window with its interval band; the "
                     "dashed line is the tolerance. Dot colour is the verdict; thin grey bars are "
                     "the Holm-adjusted bounds the verdicts rest on; a hollow dot marks a window "
                     "with little clean training after it. "
                     + ("The bottom panel is the Fisher information trace of the clean baseline "
                        "on the same epoch axis." if has_fisher else
                        "This sweep recorded no Fisher information trace (monitor=fisher adds "
                        "one).") + "</p>")
    if "heatmap" in images:
        parts.append("<h3>Start &times; length</h3><img alt='damage heatmap' "
                     f"src='data:image/png;base64,{images['heatmap']}'>")
    if "curves" in images:
        parts.append("<h3>Learning curves</h3><img alt='learning curves' "
                     f"src='data:image/png;base64,{images['curves']}'>"
                     "<p class='fig-note'>Held-out accuracy during training, mean &plusmn; sd "
                     "over seeds, with the deficit window shaded.</p>")
    if len(table):
        parts.append("<h2>Sensitivity table</h2>"
                     + _table_html(table, removal, view.schedule_epochs)
                     + "<p class='fig-note'>Also written as sensitivity.csv and "
                     "sensitivity.parquet beside this page.</p>")
    parts.append("<h2>Runs</h2>" + _health(status, table))
    rows = "".join(f"<tr><td class='l'><b>{_e(k)}</b></td><td class='l'>{_e(v)}</td></tr>"
                   for k, v in _config_rows(view.config))
    parts.append(f"<h2>Config</h2><table>{rows}</table><details><summary>full resolved config "
                 f"(config.yaml)</summary><pre>{_e(yaml.safe_dump(view.config, sort_keys=False))}"
                 "</pre></details>")
    parts.append("<h2>Reproduce</h2>" + _reproduce(view))
    parts.append("<h2>Method and caveats</h2>" + _method(view, table))
    parts.append("<footer>Written by periodscan report.</footer>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<title>periodscan report: {_e(view.name)}</title><style>{STYLE}</style></head>"
            f"<body><main>{''.join(parts)}</main></body></html>")
