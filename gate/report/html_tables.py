"""The HTML report's tables: the overview (worst first), rules (failing first), and layers.

Sortable tables carry the raw number of each numeric cell in ``data-v`` so the
inline script sorts numerically; without the script they are plain tables.
Status words, the order of entries and verdicts, and every figure's spelling
come from the result and the metric catalogue; nothing is decided here.
Every model-supplied string goes through ``html_escape``.
"""

from __future__ import annotations

import math
from collections.abc import Collection, Sequence

from gate import metrics, units
from gate.records import LayerRecord, Metric, RunRecord
from gate.report.html_layers import Picked, pick_changes, pick_layers, rest_line
from gate.report.text import html_escape
from gate.result import FAIL, PASS, REMOVED, WAIVED, WARN, Entry, Finding, GateResult, Verdict

# How a status word of an entry is shown: (sort rank, css class); worst first.
STATUS_CHIPS = {FAIL: (0, "v-fail"), WARN: (1, "v-warn"), PASS: (2, "v-pass"),
                REMOVED: (3, "v-none")}


def entry_anchor(index: int) -> str:
    """The element id of the ``index``-th entry in worst-first order (never a model name)."""
    return f"e{index}"


def change_class(metric: str, base: Metric | None, head: Metric | None) -> str:
    """``better``, ``worse`` or ``same``: the catalogue's direction (one tolerance for every
    report); a neutral metric (MACs) is never coloured."""
    word = metrics.direction(metric, base, head)
    return word if word in ("better", "worse") else "same"


def status_chip(word: str) -> str:
    """The coloured status word of an entry (fail, warn, pass, removed)."""
    return f"<span class=\"chip {STATUS_CHIPS[word][1]}\">{html_escape(word)}</span>"


def _verdict_word(verdict: Verdict) -> str:
    """fail (blocks the merge), warning, waived, pass, or other."""
    if verdict.status == FAIL:
        return "fail" if verdict.blocks_merge else "warning"
    return verdict.status if verdict.status in (WAIVED, PASS) else "other"


def verdict_chip(verdict: Verdict) -> str:
    """The coloured label of one verdict."""
    word = _verdict_word(verdict)
    css = {"fail": "v-fail", "warning": "v-warn", WAIVED: "v-waived", PASS: "v-pass"}
    return f"<span class=\"chip {css.get(word, 'v-none')}\">{html_escape(word)}</span>"


_ABSENT = "<td class=\"num same\" data-v=\"-Infinity\">\u2013</td>"  # no such layer or run


def _num(metric: str, value: Metric | None) -> str:
    """A figure; an unknown one (None) reads ``?`` (the catalogue's spelling), never 0."""
    if value is None:
        return f"<td class=\"num unknown\" data-v=\"-Infinity\">{metrics.fmt(metric, None)}</td>"
    return (f"<td class=\"num\" data-v=\"{_sort_value(value)}\">"
            f"{html_escape(metrics.fmt(metric, value))}</td>")


def _sort_value(value: float) -> str:
    number = float(value)
    if math.isnan(number):
        return "-Infinity"
    return repr(number) if math.isfinite(number) else ("Infinity" if number > 0 else "-Infinity")


def _change(metric: str, base: Metric | None, head: Metric | None) -> str:
    """The change of a figure both sides have; ``?`` when either side is unknown."""
    if base is None or head is None:
        return (f"<td class=\"num unknown\" data-v=\"-Infinity\">"
                f"{html_escape(metrics.fmt_change(metric, base, head))}</td>")
    impact = float(head) - float(base)
    return (f"<td class=\"num {change_class(metric, base, head)}\" "
            f"data-v=\"{_sort_value(impact)}\">"
            f"{html_escape(metrics.fmt_change(metric, base, head))}</td>")


def _table(headers: Sequence[tuple[str, bool]], rows: Sequence[str], *, sortable: bool,
           table_id: str = "", scroll: bool = False) -> str:
    num = ' class="num"'
    head = "".join(f"<th{num if numeric else ''} scope=\"col\">{html_escape(label)}</th>"
                   for label, numeric in headers)
    attrs = (f" id=\"{table_id}\"" if table_id else "") + (" class=\"sortable\"" if sortable else "")
    wrap = "table-wrap scroll" if scroll else "table-wrap"
    return (f"<div class=\"{wrap}\"><table{attrs}><thead><tr>{head}</tr></thead>\n<tbody>\n"
            + "\n".join(rows) + "\n</tbody></table></div>\n")


# --- overview -----------------------------------------------------------------

def overview_table(result: GateResult) -> str:
    """Every model x target worst first (the order of the sections below), with its worst
    layer and the latency and energy change."""
    trend = "vs previous run" if result.command == "audit" else "vs base"
    rows = [f"<tr><td class=\"name\">{html_escape(e.model)}</td><td>\u2013</td>"
            f"<td data-v=\"-1\"><span class=\"chip v-fail\">not analysed</span></td>"
            f"<td colspan=\"5\">{html_escape(e.message)}</td></tr>" for e in result.errors]
    rows += [_overview_row(entry, index) for index, entry in enumerate(result.ranked_entries)]
    headers = [("status", False), ("model", False), ("target", False), ("failed rules", False),
               ("worst layer", False), ("latency", True), (f"latency {trend}", True),
               (f"energy {trend}", True)]
    title = "Models, worst first" if result.command == "audit" else "Overview, worst first"
    return (f"<section class=\"card\" id=\"overview\"><h2>{title}</h2>\n"
            + _table(headers, rows, sortable=True, table_id="overview-table") + "</section>\n")


def _overview_row(entry: Entry, index: int) -> str:
    word = entry.status_word
    failed = ", ".join(f"<code>{html_escape(v.rule_id)}</code>"
                       for v in entry.ranked_verdicts if v.status == FAIL) or "\u2013"
    worst = entry.worst_layer
    cells = [f"<td data-v=\"{STATUS_CHIPS[word][0]}\">{status_chip(word)}</td>",
             (f"<td class=\"name\"><a href=\"#{entry_anchor(index)}\">"
              f"{html_escape(entry.model)}</a></td>"),
             f"<td><code>{html_escape(entry.target)}</code></td>", f"<td>{failed}</td>",
             f"<td class=\"name layer\">{html_escape(worst) if worst else '&ndash;'}</td>"]
    cells.append(_num("latency_s", _totals(entry, "latency_s")[1]) if entry.head else _ABSENT)
    for metric in ("latency_s", "energy_j"):
        base, head = _totals(entry, metric)
        if entry.head is None:
            cells.append("<td class=\"num\" data-v=\"-Infinity\">removed</td>")
        elif entry.base is None:
            cells.append("<td class=\"num\" data-v=\"-Infinity\">new</td>")
        else:
            cells.append(_change(metric, base, head))
    return "<tr>" + "".join(cells) + "</tr>"


def _totals(entry: Entry, metric: str) -> tuple[Metric | None, Metric | None]:
    if entry.diff is not None and metric in entry.diff.totals:
        old, new = entry.diff.totals[metric]
        return (old if entry.base else None), (new if entry.head else None)
    base = entry.base.metrics.get(metric) if entry.base else None
    head = entry.head.metrics.get(metric) if entry.head else None
    return base, head


# --- rules ----------------------------------------------------------------------

# Findings listed under a rule (failing ones first, furthest past the limit first): a rule
# that fails at every layer of a 200k-layer model must not write 200k rows.
MAX_FINDINGS_PER_RULE = 20


def rules_table(entry: Entry) -> str:
    """Every rule with its outcome, failing first; the findings (layer, sentence, waiver) under
    each, and the remedy once per rule. Never in a scroll box: it is what a reader came for."""
    if not entry.verdicts:
        return "<p class=\"note\">No rules applied to this model on this target.</p>\n"
    rows = []
    for v in entry.ranked_verdicts:
        remedy = html_escape(v.remedy) if v.status == FAIL else ""
        rows.append(f"<tr class=\"rule\" data-rule=\"{html_escape(v.rule_id)}\" "
                    f"data-verdict=\"{_verdict_word(v)}\"><td>{verdict_chip(v)}</td>"
                    f"<td><code>{html_escape(v.rule_id)}</code></td>"
                    f"<td>{html_escape(v.summary)}<br><span class=\"note\">"
                    f"{html_escape(v.description)}</span></td><td>{remedy}</td></tr>")
        ordered = [*v.failing, *(f for f in v.findings if f.status != FAIL)]
        rows += [_finding_row(v, f) for f in ordered[:MAX_FINDINGS_PER_RULE]]
        if len(ordered) > MAX_FINDINGS_PER_RULE:
            rest = len(ordered) - MAX_FINDINGS_PER_RULE
            rows.append(f"<tr class=\"finding rest\" data-rest=\"{rest}\"><td></td>"
                        f"<td colspan=\"3\">And {rest:,} more finding{'s' if rest != 1 else ''}"
                        " of this rule; full detail in the JSON report.</td></tr>")
    headers = [("outcome", False), ("rule", False), ("summary", False), ("fix", False)]
    return _table(headers, rows, sortable=False)


def _finding_row(verdict: Verdict, finding: Finding) -> str:
    """One finding as its sentence (it names the layer or the model itself), the remedy left
    to the rule's row."""
    waiver = ""
    if finding.status == WAIVED:
        waiver = (f" <em>Waived: {html_escape(finding.waiver_reason)}"
                  f" (until {html_escape(finding.waiver_expires or 'no date')}).</em>")
    css = "finding failing" if finding.status == FAIL else "finding"
    layer = f" data-layer=\"{html_escape(finding.layer)}\"" if finding.layer is not None else ""
    return (f"<tr class=\"{css}\"{layer}><td></td><td colspan=\"3\">"
            f"{html_escape(verdict.text_of(finding))}{waiver}</td></tr>")


# --- layers ---------------------------------------------------------------------

_LAYER_METRICS = ("latency_s", "energy_j", "utilization", "arithmetic_intensity", "param_bytes")


def layer_table(entry: Entry, flagged: Collection[str] = ()) -> str:
    """The layers that matter (``gate.report.html_layers``) of the head, or of the diff's
    layer pairs when there is a base, and one line counting the rest; rows of ``flagged``
    layers (named by failing findings) are marked."""
    if entry.diff is not None and entry.base is not None and entry.head is not None:
        headers = [("change", False), ("layer", False), ("op", False),
                   ("base latency", True), ("latency", True), ("latency change", True),
                   ("energy change", True), (metrics.label("param_bytes"), True),
                   (f"{metrics.label('param_bytes')} change", True),
                   (metrics.label("utilization"), True)]
        picked = pick_changes(entry.diff, entry.head.layers, flagged)
        return (_table(headers, _diff_rows(entry, flagged, picked.positions), sortable=True,
                       scroll=True) + _rest(picked, with_base=True))
    run = entry.head or entry.base
    assert run is not None
    total_s = run.metrics.get("latency_s")
    headers = [("layer", False), ("op", False), ("precision", False), ("bound", False),
               ("latency", True),
               ("share of latency", True),
               *((metrics.label(m), True) for m in _LAYER_METRICS[1:]), ("params fit", False)]
    picked = pick_layers(run.layers, flagged)
    rows = [_layer_row(run.layers[k], total_s, run.layers[k].name in flagged)
            for k in picked.positions]
    return _table(headers, rows, sortable=True, scroll=True) + _rest(picked, with_base=False)


def _rest(picked: Picked, *, with_base: bool) -> str:
    line = rest_line(picked, with_base=with_base)
    return (f"<p class=\"note\" data-rest=\"{picked.rest}\">{html_escape(line)}</p>\n"
            if line else "")


def _row_open(is_flagged: bool, css: str = "") -> str:
    classes = " ".join(c for c in (css, "flagged" if is_flagged else "") if c)
    return f"<tr class=\"{classes}\">" if classes else "<tr>"


def _share_cell(latency_s: Metric | None, total_s: Metric | None) -> str:
    """The layer's share of the model's latency; ``?`` when either is unknown."""
    if latency_s is None or total_s is None or not total_s:
        return f"<td class=\"num unknown\" data-v=\"-Infinity\">{units.fmt_share(None)}</td>"
    share = float(latency_s) / float(total_s)
    return f"<td class=\"num\" data-v=\"{_sort_value(share)}\">{units.fmt_share(share)}</td>"


def _layer_row(layer: LayerRecord, total_s: Metric | None, is_flagged: bool) -> str:
    m = layer.metrics
    note = "" if layer.modelled else f" <em>(not modelled: {html_escape(layer.unmodelled_reason)})</em>"
    if layer.fused_label:
        note += f" <span class=\"note\">({html_escape(layer.fused_label)})</span>"
    return (_row_open(is_flagged) + f"<td class=\"name\">{html_escape(layer.name)}{note}</td>"
            f"<td><code>{html_escape(layer.op_type)}</code></td>"
            f"<td>{html_escape(layer.precision or '-')}</td><td>{html_escape(layer.bound)}</td>"
            + _num("latency_s", m.get("latency_s"))
            + _share_cell(m.get("latency_s"), total_s)
            + "".join(_num(metric, m.get(metric)) for metric in _LAYER_METRICS[1:])
            + f"<td>{'yes' if layer.params_fit else 'no'}</td></tr>")


def _index(run: RunRecord) -> dict[str, LayerRecord]:
    out: dict[str, LayerRecord] = {}
    for layer in run.layers:
        out.setdefault(layer.name, layer)
    return out


def _layer_num(layer: LayerRecord | None, metric: str) -> str:
    """A layer's figure: a dash when the layer is absent on that side, ``?`` when unknown."""
    return _ABSENT if layer is None else _num(metric, layer.metrics.get(metric))


def _layer_change(old: LayerRecord | None, new: LayerRecord | None, metric: str) -> str:
    if old is None or new is None:
        return _ABSENT
    return _change(metric, old.metrics.get(metric), new.metrics.get(metric))


def _diff_rows(entry: Entry, flagged: Collection[str], positions: Sequence[int]) -> list[str]:
    assert entry.diff is not None and entry.base is not None and entry.head is not None
    base_layers, head_layers = _index(entry.base), _index(entry.head)
    rows = []
    for change in (entry.diff.layers[k] for k in positions):
        old = base_layers.get(change.base_name) if change.base_name is not None else None
        new = head_layers.get(change.head_name) if change.head_name is not None else None
        name = change.head_name if change.head_name is not None else change.base_name
        renamed = ""
        if old is not None and new is not None and old.name != new.name:
            renamed = f" <span class=\"note\">(was {html_escape(old.name)})</span>"

        rows.append(
            _row_open(name in flagged, f"ch-{html_escape(change.status)}")
            + f"<td>{html_escape(change.status)}</td>"
            f"<td class=\"name\">{html_escape(name or '')}{renamed}</td>"
            f"<td><code>{html_escape(change.op_type)}</code></td>"
            + _layer_num(old, "latency_s") + _layer_num(new, "latency_s")
            + _layer_change(old, new, "latency_s") + _layer_change(old, new, "energy_j")
            + _layer_num(new, "param_bytes") + _layer_change(old, new, "param_bytes")
            + _layer_num(new, "utilization") + "</tr>")
    return rows
