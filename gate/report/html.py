"""Self-contained HTML report: overview, then per model x target figures, charts, rules, layers.

One file that opens offline (inline CSS, inline SVG charts, one small inline
script allowed by a Content-Security-Policy hash; no fonts, images or scripts
from anywhere). Every model-supplied string goes through ``html_escape``. The
charts need matplotlib (``pip install 'roofgate[html]'``); without it the
reporter fails with that hint before writing anything.

Only formats the ``GateResult``: every figure comes from the records, the
verdicts and the diff.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TextIO

from gate import metrics
from gate.records import LayerRecord, Metric, RunRecord
from gate.report import charts
from gate.report.html_assets import CONTENT_SECURITY_POLICY, CSS, SCRIPT
from gate.report.html_tables import (
    delta_class,
    entry_anchor,
    layer_table,
    overview_table,
    rules_table,
)
from gate.report.text import html_escape
from gate.result import FAIL, Entry, GateResult

# Key figures per entry: (metric, label, True when lower is better).
KEY_FIGURES: tuple[tuple[str, str, bool], ...] = (
    ("latency_s", "latency per inference", True),
    ("inferences_per_s", "inferences per second", False),
    ("energy_j", "energy per inference", True),
    ("utilization", "PE-array utilization", False),
    ("peak_flops_share", "share of peak FLOP/s", False),
    ("param_bytes", "parameters", True),
    ("param_dram_bytes", "parameter DRAM traffic", True),
    ("act_dram_bytes", "activation DRAM traffic", True),
    ("coverage_work_share", "work modelled", False),
)
_TITLES = {"evaluate": "model evaluation", "check": "model check", "audit": "model zoo audit"}


class HtmlReporter:
    """``--html PATH``: the report as one self-contained HTML page with charts."""

    name = "html"
    help = "Write a self-contained HTML report with roofline and per-layer charts"

    def write(self, result: GateResult, stream: TextIO) -> None:
        charts.require_matplotlib()  # fail with the install hint before any output
        stream.write(render(result))


REPORTER = HtmlReporter()


def render(result: GateResult) -> str:
    """The whole page."""
    parts = [_page_head(result), _summary(result), _notes(result.notes), _errors(result)]
    if result.entries:
        parts.append(overview_table(result))
    for index, entry in enumerate(result.entries):
        parts.append(_entry_section(entry, index))
    parts.append(_footer())
    return "".join(parts)


# --- page frame ---------------------------------------------------------------

def _page_head(result: GateResult) -> str:
    title = f"roofgate {_TITLES.get(result.command, html_escape(result.command))}"
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f"<meta http-equiv=\"Content-Security-Policy\" content=\"{CONTENT_SECURITY_POLICY}\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        "<meta name=\"referrer\" content=\"no-referrer\">\n"
        f"<title>{title}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<main>\n"
    )


def _summary(result: GateResult) -> str:
    failed = result.failed_verdicts
    blocking = sum(1 for v in failed if v.blocks_merge)
    code = result.exit_code
    verdict = ("passed" if code == 0 else "failed: a blocking rule failed" if code == 1
               else "failed: a model could not be analysed")
    chip = "v-pass" if code == 0 else "v-fail"
    policies = ", ".join(f"<code>{html_escape(p)}</code>" for p in result.policies) or "none"
    rules = sum(len(e.verdicts) for e in result.entries)
    return (
        "<header class=\"top\">\n<div class=\"brand\">roofgate</div>\n"
        f"<h1>{_TITLES.get(result.command, html_escape(result.command)).capitalize()} "
        f"<span class=\"chip {chip}\" id=\"overall\">{verdict}</span></h1>\n"
        f"<p class=\"sub\">{len(result.entries)} model \u00d7 target runs, {rules} rule checks, "
        f"{len(failed)} failed ({blocking} blocking), {len(result.errors)} models not analysed. "
        f"Policies: {policies}.</p>\n"
        "<p class=\"sub\">Analytical estimates from the model file and the target profile, "
        "not device measurements: confirm on the device before release.</p>\n</header>\n"
    )


def _notes(notes: Sequence[str]) -> str:
    if not notes:
        return ""
    items = "".join(f"<li>{html_escape(n)}</li>" for n in notes)
    return f"<section class=\"card\" id=\"notes\"><h2>Notes</h2><ul class=\"plain\">{items}</ul></section>\n"


def _errors(result: GateResult) -> str:
    if not result.errors:
        return ""
    allowed = " (let through by the policy)" if result.allow_errors else ""
    items = "".join(
        f"<li><code class=\"name\">{html_escape(e.model)}</code>: {html_escape(e.message)}</li>"
        for e in result.errors)
    return (f"<section class=\"card st-fail\" id=\"errors\"><h2>Models that could not be "
            f"analysed{allowed}</h2><ul class=\"plain\">{items}</ul></section>\n")


def _footer() -> str:
    return (f"<footer>Written by roofgate. Charts drawn with matplotlib; tables sort by any "
            f"column when scripts run.</footer>\n</main>\n<script>{SCRIPT}</script>\n"
            "</body>\n</html>\n")


# --- one model x target ----------------------------------------------------------

def _entry_section(entry: Entry, index: int) -> str:
    anchor = entry_anchor(index)
    run = entry.head or entry.base
    name = run.model_name if run else entry.model
    status = "fail" if entry.status == FAIL else "pass"
    parts = [(
        f"<section class=\"card st-{status} entry\" id=\"{anchor}\" "
        f"data-model=\"{html_escape(entry.model)}\" data-target=\"{html_escape(entry.target)}\">\n"
        f"<h2><span class=\"model\">{html_escape(name)}</span> on "
        f"<code>{html_escape(entry.target)}</code> "
        f"<span class=\"chip v-{status}\">{status}</span></h2>\n"
        f"<p class=\"sub\">model file <code class=\"name\">{html_escape(entry.model)}</code>"
        f"{_precision(entry.head)}{_baseline_note(entry)}</p>\n")
    ]
    if entry.head is None:
        parts.append("<p class=\"note\">This model was removed in this change; its rules are "
                     "listed below.</p>\n")
    else:
        parts.append(_key_figures(entry.head, entry.base))
        parts.append(_coverage(entry.head))
        parts.append(_charts(entry, anchor))
    parts.append("<h3>Rules</h3>\n" + rules_table(entry.verdicts))
    if entry.head is not None or entry.diff is not None:
        parts.append("<h3>Layers</h3>\n" + layer_table(entry))
    parts.append("</section>\n")
    return "".join(parts)


def _precision(head: RunRecord | None) -> str:
    return f", precision <code>{html_escape(head.precision)}</code>" if head else ""


def _baseline_note(entry: Entry) -> str:
    if entry.base is None:
        return "; no baseline (new model or none given)"
    return "; compared with its baseline (base \u2192 head)"


def _key_figures(head: RunRecord, base: RunRecord | None) -> str:
    cells = []
    for metric, label, lower_better in KEY_FIGURES:
        if metric not in head.metrics:
            continue
        value = head.metrics[metric]
        delta = ""
        if base is not None and metric in base.metrics:
            delta = _delta_span(metric, base.metrics[metric], value, lower_better)
        cells.append(f"<div class=\"figure\"><div class=\"k\">{label}</div>"
                     f"<div class=\"v\">{html_escape(metrics.fmt(metric, value))}</div>{delta}</div>")
    return f"<div class=\"figures\">{''.join(cells)}</div>\n"


def _delta_span(metric: str, base: Metric, head: Metric, lower_better: bool) -> str:
    css = delta_class(base, head, lower_better, metric)
    return (f"<div class=\"d {css}\">{html_escape(metrics.fmt_change(metric, base, head))} "
            f"<span class=\"same\">(base {html_escape(metrics.fmt(metric, base))})</span></div>")


def _coverage(head: RunRecord) -> str:
    lines = []
    if head.unmodelled:
        ops = ", ".join(f"<code>{html_escape(u.op_type)}</code> \u00d7{u.count} "
                        f"({html_escape(u.reason)})" for u in head.unmodelled)
        lines.append(f"<p class=\"note\">Not modelled (no cost counted, so totals are lower "
                     f"bounds): {ops}.</p>")
    lines += [f"<p class=\"note\">{html_escape(note)}</p>" for note in head.notes]
    return "\n".join(lines) + ("\n" if lines else "")


def _charts(entry: Entry, anchor: str) -> str:
    assert entry.head is not None
    head, base = entry.head, entry.base
    roof = charts.roofline_svg(head, base, f"{anchor}-roofline")
    sel = charts.roof_points(head)
    caption = [f"{_layers(len(sel.points))} plotted, marker area by share of latency"]
    if sel.left_out:
        caption.append(f"{_layers(sel.left_out)} with the smallest latency left out")
    if sel.unplottable:
        caption.append(f"{_layers(sel.unplottable)} without FLOPs or DRAM traffic (no place "
                       "on log axes)")
    if sel.unmodelled:
        caption.append(f"{_layers(sel.unmodelled)} not modelled (no cost counted; see the "
                       "note above)")
    if base is not None:
        caption.append("hollow markers are the base")
    caption.append("intensity counts every byte a layer moves (parameters, inputs, outputs), "
                   "so a layer whose activations stay in on-chip buffers can sit above the "
                   "DRAM bandwidth slope")
    shown, left_out = charts.bar_layers(head)
    bars = charts.layer_bars_svg(head, base_latencies(entry), f"{anchor}-layers")
    bar_caption = f"the {_layers(len(shown))} with the largest latency"
    if left_out:
        bar_caption += f"; {_layers(left_out)} more in the table below"
    return (f"<h3>Roofline</h3>\n<figure>{roof}<figcaption>{'; '.join(caption)}."
            f"</figcaption></figure>\n<h3>Latency and energy per layer</h3>\n"
            f"<figure>{bars}<figcaption>{bar_caption.capitalize()}; energy split by "
            f"component.</figcaption></figure>\n")


def _layers(count: int) -> str:
    return f"{count} layer" if count == 1 else f"{count} layers"


def base_latencies(entry: Entry) -> Mapping[str, float]:
    """Head layer name -> latency of the base layer the diff matched it with."""
    if entry.diff is None or entry.base is None:
        return {}
    base_layers: dict[str, LayerRecord] = {}
    for layer in entry.base.layers:
        base_layers.setdefault(layer.name, layer)
    out: dict[str, float] = {}
    for change in entry.diff.layers:
        if change.head_name is None or change.base_name is None:
            continue
        matched = base_layers.get(change.base_name)
        if matched is not None and "latency_s" in matched.metrics:
            out[change.head_name] = float(matched.metrics["latency_s"] or 0.0)
    return out
