"""Self-contained HTML report: what blocks the merge, the overview, then one section per
model x target in the same worst-first order (rules first, failing rules first; key
figures; charts with the offending layers marked; layers).

One file that opens offline (inline CSS, inline SVG charts written directly,
one small inline script allowed by a Content-Security-Policy hash; no fonts,
images or scripts from anywhere). Every model-supplied string goes through
``html_escape``.

Only formats the ``GateResult``: every figure, status word and order comes from
the result, the records and the metric catalogue.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TextIO

from gate import metrics
from gate.records import LayerRecord, Metric, RunRecord
from gate.report import charts
from gate.report.html_assets import CONTENT_SECURITY_POLICY, CSS, SCRIPT
from gate.report.html_tables import (
    change_class,
    entry_anchor,
    layer_table,
    overview_table,
    rules_table,
    status_chip,
)
from gate.report.text import html_escape
from gate.result import (
    FAIL,
    NOT_GATED,
    Entry,
    GateResult,
    blocking_lines,
    blocking_rule_count,
    not_gated_sentence,
)

# Key figures per entry (labels, units and directions from the metric catalogue).
KEY_FIGURES: tuple[str, ...] = (
    "latency_s", "inferences_per_s", "energy_j", "utilization", "peak_flops_share",
    "param_bytes", "param_dram_bytes", "act_dram_bytes", "coverage_work_share",
)
_TITLES = {"evaluate": "model evaluation", "check": "pull-request check",
           "audit": "model zoo audit", "diff": "model diff"}
_HEADLINES = {"passed": "clear to merge", "failed": "merge blocked",
              "incomplete": "incomplete: a model could not be analysed"}


class HtmlReporter:
    """``--html PATH``: the report as one self-contained HTML page with charts."""

    name = "html"
    help = "Write a self-contained HTML report with roofline and per-layer charts"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.write(render(result))


REPORTER = HtmlReporter()


def render(result: GateResult) -> str:
    """The whole page."""
    ranked = result.ranked_entries
    anchors = {(e.model, e.target): entry_anchor(k) for k, e in enumerate(ranked)}
    parts = [_page_head(result), _summary(result), _rules_source(result),
             _blocking(result, anchors), _rules_changed(result), _errors(result),
             _skipped(result), _notes(result.notes)]
    if result.entries:
        parts.append(overview_table(result))
    for index, entry in enumerate(ranked):
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
    counts = result.counts
    chip = "v-pass" if result.status_word == "passed" else "v-fail"
    policies = ", ".join(f"<code>{html_escape(p)}</code>" for p in result.policies) or "none"
    return (
        "<header class=\"top\">\n<div class=\"brand\">roofgate</div>\n"
        f"<h1>{_TITLES.get(result.command, html_escape(result.command)).capitalize()}: "
        f"<span class=\"chip {chip}\" id=\"overall\">{_HEADLINES[result.status_word]}</span>"
        "</h1>\n"
        f"<p class=\"sub\">{counts.entries} model \u00d7 target runs, {counts.rules} rule "
        f"results: {counts.blocking} blocking, {counts.warnings} warnings, {counts.waived} "
        f"waived; {counts.errors} models not analysed. {_model_counts(result)} "
        f"Policies: {policies}.</p>\n"
        "<p class=\"sub\">Analytical estimates from the model file and the target profile, "
        "not device measurements: confirm on the device before release.</p>\n</header>\n"
    )


def _blocking(result: GateResult, anchors: Mapping[tuple[str, str], str]) -> str:
    """What blocks the merge: one sentence per blocking finding (each linking to its
    section), then each changed model outside every model group (rule ``not-gated``)."""
    lines = blocking_lines(result)
    not_gated = result.not_gated
    if not lines and not not_gated:
        return ""
    count = blocking_rule_count(result)
    parts = [(f"<section class=\"card st-fail\" id=\"blocking\"><h2>What blocks the merge "
              f"({count} rule{'s' if count != 1 else ''})</h2>")]
    if lines:
        items = "".join(f"<li><a href=\"#{anchors[(entry.model, entry.target)]}\">"
                        f"{html_escape(sentence)}</a></li>" for entry, sentence in lines)
        parts.append(f"<ol id=\"blocking-findings\">{items}</ol>")
    if not_gated:
        items = "".join(f"<li data-model=\"{html_escape(item.model)}\">"
                        f"{html_escape(not_gated_sentence(item))}</li>" for item in not_gated)
        parts.append(f"<p class=\"lead\">Not gated: changed models outside every model "
                     f"group (rule <code>{NOT_GATED}</code>)</p><ul class=\"plain\" "
                     f"id=\"not-gated\">{items}</ul>")
    return "".join(parts) + "</section>\n"


def _skipped(result: GateResult) -> str:
    """Model files left out on purpose (an ``ungated:`` or ``exclude:`` glob, a deletion):
    listed so nothing is skipped without a word, but they do not block."""
    skipped = [item for item in result.ungated if item.skipped]
    if not skipped:
        return ""
    items = "".join(f"<li><code class=\"name\">{html_escape(item.model)}</code>: "
                    f"{html_escape(item.reason)}</li>" for item in skipped)
    return (f"<section class=\"card\" id=\"skipped\"><h2>Skipped on purpose "
            f"({len(skipped)} model file{'s' if len(skipped) != 1 else ''})</h2>"
            f"<ul class=\"plain\">{items}</ul></section>\n")


def _model_counts(result: GateResult) -> str:
    """Model files seen, gated, not gated and skipped (the run's coverage of the repository)."""
    seen = result.model_counts
    return (f"Model files: {seen['seen']} seen, {seen['gated']} gated, {seen['not_gated']} not "
            f"gated, {seen['skipped']} skipped.")


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
    return (f"<footer>Written by roofgate. Tables sort by any column when scripts run."
            f"</footer>\n</main>\n<script>{SCRIPT}</script>\n"
            "</body>\n</html>\n")


# --- one model x target ----------------------------------------------------------

def _entry_section(entry: Entry, index: int) -> str:
    anchor = entry_anchor(index)
    run = entry.head or entry.base
    name = run.model_name if run else entry.model
    word = entry.status_word
    flagged = flagged_layers(entry)
    parts = [(
        f"<section class=\"card st-{word} entry\" id=\"{anchor}\" data-status=\"{word}\" "
        f"data-model=\"{html_escape(entry.model)}\" data-target=\"{html_escape(entry.target)}\">\n"
        f"<h2><span class=\"model\">{html_escape(name)}</span> on "
        f"<code>{html_escape(entry.target)}</code> {status_chip(word)}</h2>\n"
        f"<p class=\"sub\">model file <code class=\"name\">{html_escape(entry.model)}</code>"
        f"{_precision(entry.head)}{_baseline_note(entry)}</p>\n")
    ]
    parts.append("<h3>Rules</h3>\n" + _rules_applied(entry) + rules_table(entry))
    if entry.head is None:
        parts.append("<p class=\"note\">This model was removed in this change: nothing to "
                     "gate.</p>\n")
    else:
        parts.append(_key_figures(entry.head, entry.base))
        parts.append(_coverage(entry.head))
        parts.append(_charts(entry, anchor, flagged))
    if entry.head is not None or entry.diff is not None:
        parts.append("<h3>Layers</h3>\n" + layer_table(entry, flagged))
    parts.append("</section>\n")
    return "".join(parts)


def _rules_applied(entry: Entry) -> str:
    """Which rules judged this model x target (every report says it, passing or not)."""
    names = ", ".join(f"<code>{html_escape(rule)}</code>" for rule in entry.rules_applied)
    return f"<p class=\"rules-applied\">Rules applied: {names or 'none'}.</p>\n"


def flagged_layers(entry: Entry) -> frozenset[str]:
    """The layers this entry's failing findings name (marked in both charts and the table)."""
    return frozenset(f.layer for v in entry.verdicts if v.status == FAIL for f in v.failing
                     if f.layer is not None)


def _precision(head: RunRecord | None) -> str:
    return f", precision <code>{html_escape(head.precision)}</code>" if head else ""


def _baseline_note(entry: Entry) -> str:
    if entry.base is None:
        return "; no baseline (new model or none given)"
    return "; compared with its baseline (base \u2192 head)"


def _key_figures(head: RunRecord, base: RunRecord | None) -> str:
    cells = []
    for metric in KEY_FIGURES:
        if metric not in head.metrics:
            continue
        value = head.metrics[metric]
        change = ""
        if base is not None and metric in base.metrics:
            change = _change_div(metric, base.metrics[metric], value)
        cells.append(f"<div class=\"figure\"><div class=\"k\">{metrics.label(metric)}</div>"
                     f"<div class=\"v\">{html_escape(metrics.fmt(metric, value))}</div>{change}"
                     "</div>")
    return f"<div class=\"figures\">{''.join(cells)}</div>\n"


def _change_div(metric: str, base: Metric, head: Metric) -> str:
    css = change_class(metric, base, head)
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


def _charts(entry: Entry, anchor: str, flagged: frozenset[str]) -> str:
    assert entry.head is not None
    head, base = entry.head, entry.base
    points = charts.roof_points(head)
    roof = charts.roofline_svg(head, base, f"{anchor}-roofline", flagged=flagged,
                               head_points=points)
    chosen = charts.bar_layers(head)
    # the captions mention the marks only when a marked layer is drawn
    ringed = any(point.name in flagged for point in points.points)
    shaded = any(layer.name in flagged for layer in chosen.layers)
    bars = charts.layer_bars_svg(head, base_latencies(entry), f"{anchor}-layers",
                                 flagged=flagged, bars=chosen)
    return (f"<h3>Roofline</h3>\n<figure>{roof}<figcaption>"
            f"{_roof_caption(points, head, base is not None, ringed)}."
            f"</figcaption></figure>\n<h3>Latency and energy per layer</h3>\n"
            f"<figure>{bars}<figcaption>{_bar_caption(chosen, shaded)}; energy split "
            f"by component.</figcaption></figure>\n")


def _roof_caption(sel: charts.RoofSelection, head: RunRecord, with_base: bool,
                  with_flags: bool) -> str:
    """What the roofline shows, and every layer it does not (never silently)."""
    caption = [(f"{_layers(len(sel.points))} plotted at the FLOP/s each achieves, marker area "
               "by share of latency; the roof is what the target attains at "
               f"{html_escape(head.precision)}")]
    if with_flags:
        caption.append("ringed in red: layers a failing rule names")
    if sel.left_out:
        caption.append(f"{_layers(sel.left_out)} with the smallest latency left out")
    if sel.unplottable:
        caption.append(f"{_layers(sel.unplottable)} without FLOPs or DRAM traffic (no place "
                       "on log axes)")
    if sel.unmodelled:
        caption.append(f"{_layers(sel.unmodelled)} not modelled (no cost counted; see the "
                       "note above)")
    if sel.unknown:
        caption.append(f"{_layers(sel.unknown)} with an unknown intensity, FLOP/s or latency "
                       "not plotted (unknown, not zero)")
    if with_base:
        caption.append("hollow markers are the base")
    caption.append("intensity counts every byte a layer moves (parameters, inputs, outputs), "
                   "so a layer whose activations stay in on-chip buffers can sit above the "
                   "DRAM bandwidth slope")
    return "; ".join(caption)


def _bar_caption(chosen: charts.BarSelection, with_flags: bool) -> str:
    """What the bar chart shows, and the layers it leaves out or cannot draw."""
    caption = (f"the {_layers(len(chosen.layers))} with the largest latency" if chosen.layers
               else "no layer with a known latency to draw")
    if chosen.left_out:
        caption += f"; {_layers(chosen.left_out)} more (the table below lists the ones that matter)"
    if chosen.unknown_latency:
        caption += (f"; {_layers(chosen.unknown_latency)} with an unknown latency not drawn "
                    "(unknown, not zero)")
    no_energy = sum(1 for layer in chosen.layers if charts.unknown_energy(layer))
    if no_energy:
        caption += f"; energy unknown for {_layers(no_energy)} shown (marked ?)"
    if with_flags:
        caption += "; rows shaded red are named by a failing rule"
    return caption[:1].upper() + caption[1:]  # (str.capitalize would lower the rest)


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
        latency = charts.known(matched.metrics, "latency_s") if matched is not None else None
        if latency is not None:  # an unknown base latency gets no tick (never one at 0)
            out[change.head_name] = latency
    return out


def _rules_source(result: GateResult) -> str:
    """Where ``check`` took its rules from, right under the headline."""
    source = result.rules_source
    if source is None:
        return ""
    style = " st-fail" if source.from_head else ""
    return (f"<section class=\"card{style}\" id=\"rules-source\"><p>"
            f"{html_escape(source.statement)}</p></section>\n")


def _rules_changed(result: GateResult) -> str:
    """The rules section: one item per change the pull request makes to the rules."""
    source = result.rules_source
    if source is None or not source.changes:
        return ""
    items = "".join(f"<li>{html_escape(line)}</li>" for line in source.changes)
    return (f"<section class=\"card\" id=\"rules-changed\"><h2>{html_escape(source.heading)}"
            f"</h2><ul class=\"plain\">{items}</ul></section>\n")
