"""The report page: one self-contained HTML file (styles inline, images as data URIs).

The page answers in the order a reader asks: what was measured, the answer (critical window,
safe slots), the evidence (figures, table), how healthy the runs were, the config and the
command that reproduces the sweep, and the caveats. It never asks which design a sweep used:
the design's :class:`~periodscan.designs.layout.Layout` and one-line summary say what it needs.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
import yaml

from periodscan.analysis.planner import PlanAnswer
from periodscan.designs.layout import Layout
from periodscan.views.html_results import answer_html, method_html, runs_html, table_html
from periodscan.views.markup import escape
from periodscan.views.variant_html import variant_answer_section, variant_tables_html
from periodscan.views.words import PROXY_CAVEAT, dataset_name, deficit_name, short_name

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


@dataclass(kw_only=True)
class PageInput:
    """Everything the page shows. ``view`` is the :class:`periodscan.api.SweepView` (name,
    folder, config, schedule_epochs, command); ``images`` maps figure keys ("sensitivity",
    "heatmap", "curves") to base64 PNG data; ``finished`` is False until a window run has a
    result."""

    view: Any
    table: pd.DataFrame
    layout: Layout
    design_summary: str
    status: Any
    title: str
    plans: list[PlanAnswer] = field(default_factory=list)
    images: dict[str, str] = field(default_factory=dict)
    has_fisher: bool = False
    finished: bool = True


def _params(node: dict) -> str:
    items = [f"{k}={v}" for k, v in (node or {}).items() if k != "_target_" and v is not None]
    return ", ".join(items)


def config_rows(config: dict, design_summary: str) -> list[tuple[str, str]]:
    """(label, text) rows of the config table: components, schedule, design, statistics."""
    sched = config.get("schedule") or {}
    opt = sched.get("optimizer") or {}
    rows = [(group, f"{short_name((config.get(group) or {}).get('_target_'))} "
                    f"({_params(config.get(group) or {})})")
            for group in ("deficit", "data", "model")]
    rows.append(("schedule", f"{sched.get('epochs')} epochs, batch {sched.get('batch_size')}, "
                             f"{opt.get('name')} lr {opt.get('lr')} momentum "
                             f"{opt.get('momentum')} weight decay {opt.get('weight_decay')}, "
                             f"{(sched.get('lr_schedule') or {}).get('kind')} lr schedule"))
    rows.append(("design", design_summary))
    rows.append(("seeds", str(config.get("seeds"))))
    rows.append(("tolerance / confidence",
                 f"{config.get('tolerance')} points / {config.get('confidence')}"))
    executor = config.get("executor") or {}
    workers = executor.get("workers") or "one per core"
    rows.append(("executor", f"{executor.get('kind')}, workers: {workers}, "
                             f"{executor.get('threads_per_worker')} torch thread(s) each"))
    return rows


def header_html(page: PageInput) -> str:
    """Title, the question the sweep asks, the proxy caveat, and a warning if partial."""
    view, config = page.view, page.view.config
    deficit = deficit_name(config)
    data = dataset_name(config.get("data") or {})
    parts = [f"<h1>periodscan report: {escape(view.name)}</h1>",
             f"<p class='sub'>{escape(page.title)} &middot; written "
             f"{time.strftime('%Y-%m-%d %H:%M')} &middot; {escape(view.folder)}</p>",
             f"<p>How much lasting damage does a temporary <b>{escape(deficit)}</b> deficit "
             f"on {escape(data)} do, depending on when in a {view.schedule_epochs}-epoch "
             f"schedule it is switched on ({escape(page.design_summary)})? Each run is compared "
             "with a clean baseline of the same seed on the same held-out examples: damage = "
             "baseline accuracy &minus; run accuracy, in accuracy points.</p>",
             f"<div class='caveat'>{escape(PROXY_CAVEAT)}</div>"]
    status = page.status
    if status.state != "finished":
        parts.append(f"<div class='partial'>Sweep state: <b>{escape(status.state)}</b>. "
                     f"{status.runs_done} of {status.runs_total} runs finished: the numbers "
                     "below are partial.</div>")
    return "".join(parts)


def _image(key: str, alt: str, page: PageInput) -> str:
    return f"<img alt='{alt}' src='data:image/png;base64,{page.images[key]}'>"


def _variant_curve_note(page: PageInput) -> str:
    return (f"<p class='fig-note'>One line per {escape(page.layout.variant_axis)}, mean damage "
            "with its interval band; the dashed line is the tolerance. Marker shape is the "
            "verdict: triangle up critical, triangle down safe, dot undetermined.</p>")


def figures_html(page: PageInput) -> str:
    """The embedded figures with a line each on how to read them."""
    parts = []
    if "sensitivity" in page.images:
        fisher = ("The bottom panel is the Fisher information trace of the clean baseline on "
                  "the same epoch axis." if page.has_fisher else
                  "This sweep recorded no Fisher information trace (monitor=fisher adds one).")
        parts.append("<h2>Sensitivity</h2>" + _image("sensitivity", "sensitivity curve", page)
                     + (_variant_curve_note(page) if page.layout.variant_axis else
                        "<p class='fig-note'>Mean damage per window with its interval band; the "
                        "dashed line is the tolerance. Dot colour is the verdict; thin grey bars "
                        "are the Holm-adjusted bounds the verdicts rest on; a hollow dot marks a "
                        f"window with little clean training after it. {fisher}</p>"))
    if "severity_map" in page.images:
        parts.append("<h3>Severity &times; start</h3>" + _image("severity_map", "severity map",
                                                                page)
                     + "<p class='fig-note'>Mean damage of every severity level at every start; "
                     "the letter is the level's verdict at that start.</p>")
    if "heatmap" in page.images:
        parts.append("<h3>Start &times; length</h3>" + _image("heatmap", "damage heatmap", page))
    if "curves" in page.images:
        parts.append("<h3>Learning curves</h3>" + _image("curves", "learning curves", page)
                     + "<p class='fig-note'>Held-out accuracy during training, mean &plusmn; sd "
                     "over seeds, with the deficit window shaded.</p>")
    return "".join(parts)


def config_html(page: PageInput) -> str:
    config = page.view.config
    rows = "".join(f"<tr><td class='l'><b>{escape(k)}</b></td><td class='l'>{escape(v)}</td></tr>"
                   for k, v in config_rows(config, page.design_summary))
    return (f"<h2>Config</h2><table>{rows}</table><details><summary>full resolved config "
            f"(config.yaml)</summary><pre>{escape(yaml.safe_dump(config, sort_keys=False))}"
            "</pre></details>")


def reproduce_html(view) -> str:
    """The command that started the sweep, or the Python that repeats it."""
    if view.command:
        return (f"<h2>Reproduce</h2><p>The sweep was started with this command; rerunning it "
                f"resumes or, in a fresh results folder, repeats the sweep:</p>"
                f"<pre>{escape(view.command)}</pre>")
    return ("<h2>Reproduce</h2><p>The sweep was started from Python, so no command was "
            "recorded. Its resolved config (below) reproduces it; as it stands the call resumes "
            "this folder, and with <code>results_dir</code> set to a fresh folder it repeats the "
            "sweep:</p><pre>import yaml, periodscan\n"
            f"config = yaml.safe_load(open({str(view.folder / 'config.yaml')!r}))\n"
            "periodscan.run_sweep(config)</pre>")


def render_page(page: PageInput) -> str:
    """The whole page as one string."""
    table, layout = page.table, page.layout
    variants = "variant" in table  # a sweep of deficit variants (views/variant_html.py)
    answer = (variant_answer_section(table, page.plans, layout, page.finished) if variants
              else answer_html(table, page.plans, layout, page.finished))
    parts = [header_html(page), answer, figures_html(page)]
    if len(table):
        tables = variant_tables_html if variants else table_html
        parts.append("<h2>Sensitivity table</h2>"
                     + tables(table, layout, page.view.schedule_epochs)
                     + "<p class='fig-note'>Also written as sensitivity.csv and "
                     "sensitivity.parquet beside this page.</p>")
    parts += ["<h2>Runs</h2>" + runs_html(page.status, table), config_html(page),
              reproduce_html(page.view), "<h2>Method and caveats</h2>" + method_html(table, layout),
              "<footer>Written by periodscan report.</footer>"]
    name = escape(page.view.name)
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<title>periodscan report: {name}</title><style>{STYLE}</style></head>"
            f"<body><main>{''.join(parts)}</main></body></html>")
