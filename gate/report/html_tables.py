"""The HTML report's tables: the overview (models by worst verdict), rules, and layers.

Sortable tables carry the raw number of each numeric cell in ``data-v`` so the
inline script sorts numerically; without the script they are plain tables.
Every model-supplied string goes through ``html_escape``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from gate import metrics, units
from gate.records import LayerRecord, Metric, RunRecord
from gate.report.text import html_escape
from gate.result import FAIL, PASS, WAIVED, Entry, Finding, GateResult, Verdict

# Worst-first ranks of an entry's verdicts: (rank, css class, label).
NOT_ANALYSED = (-1, "v-error", "not analysed")
BLOCKING = (0, "v-fail", "fail")
WARNING = (1, "v-warn", "warning")
WAIVED_ONLY = (2, "v-waived", "waived")
PASSED = (3, "v-pass", "pass")
NO_RULES = (4, "v-none", "no rules")


def entry_anchor(index: int) -> str:
    """The element id of the ``index``-th entry's section (ids never carry model names)."""
    return f"e{index}"


def delta_class(base: Metric, head: Metric, lower_better: bool, metric: str = "") -> str:
    """``better``, ``worse`` or ``same`` for a change from ``base`` to ``head``.

    Changes too small to show (under 0.05 percentage points for shares, under
    0.05% otherwise) count as ``same``, so a figure that reads "-0.0 pp" is not coloured.
    An unknown side (None) is ``same``: nothing to colour, the cell reads '?'.
    """
    if base is None or head is None:
        return "same"
    change = abs(float(head) - float(base))
    is_share = metric.endswith("_share") or metric == "utilization"
    if change <= (5e-4 if is_share else 5e-4 * max(abs(base), abs(head))):
        return "same"
    return "better" if (head < base) == lower_better else "worse"


def worst_verdict(verdicts: Sequence[Verdict]) -> tuple[int, str, str]:
    """The worst of an entry's verdicts as (rank, css class, label); lower rank is worse."""
    if not verdicts:
        return NO_RULES
    if any(v.blocks_merge for v in verdicts):
        return BLOCKING
    if any(v.status == FAIL for v in verdicts):
        return WARNING
    if any(v.status == WAIVED for v in verdicts):
        return WAIVED_ONLY
    return PASSED


def _verdict_word(verdict: Verdict) -> str:
    """fail (blocks the merge), warning, waived, pass, or the raw status."""
    if verdict.status == FAIL:
        return "fail" if verdict.severity == "error" else "warning"
    return verdict.status if verdict.status in (WAIVED, PASS) else "other"


def verdict_chip(verdict: Verdict) -> str:
    """The coloured label of one verdict."""
    if verdict.status == FAIL:
        css, label = ("v-fail", "fail") if verdict.severity == "error" else ("v-warn", "warning")
    elif verdict.status == WAIVED:
        css, label = "v-waived", "waived"
    elif verdict.status == PASS:
        css, label = "v-pass", "pass"
    else:
        css, label = "v-none", html_escape(verdict.status)
    return f"<span class=\"chip {css}\">{label}</span>"


def _num(metric: str, value: Metric | None) -> str:
    if value is None:
        return "<td class=\"num\" data-v=\"-Infinity\">\u2013</td>"
    return (f"<td class=\"num\" data-v=\"{_sort_value(value)}\">"
            f"{html_escape(metrics.fmt(metric, value))}</td>")


def _sort_value(value: float) -> str:
    number = float(value)
    return repr(number) if math.isfinite(number) else ("Infinity" if number > 0 else "-Infinity")


def _delta(metric: str, base: Metric | None, head: Metric | None, lower_better: bool = True) -> str:
    if base is None or head is None:
        return "<td class=\"num same\" data-v=\"-Infinity\">\u2013</td>"
    css = delta_class(base, head, lower_better, metric)
    return (f"<td class=\"num {css}\" data-v=\"{_sort_value(float(head) - float(base))}\">"
            f"{html_escape(metrics.fmt_change(metric, base, head))}</td>")


def _table(headers: Sequence[tuple[str, bool]], rows: Sequence[str], *, sortable: bool,
           table_id: str = "") -> str:
    num = ' class="num"'
    head = "".join(f"<th{num if numeric else ''} scope=\"col\">{label}</th>"
                   for label, numeric in headers)
    attrs = (f" id=\"{table_id}\"" if table_id else "") + (" class=\"sortable\"" if sortable else "")
    return (f"<div class=\"table-wrap\"><table{attrs}><thead><tr>{head}</tr></thead>\n<tbody>\n"
            + "\n".join(rows) + "\n</tbody></table></div>\n")


# --- overview -----------------------------------------------------------------

def overview_table(result: GateResult) -> str:
    """Every model x target, models with the worst verdict first, with the latency/energy trend."""
    is_audit = result.command == "audit"
    ranked = [(worst_verdict(e.verdicts), i, e) for i, e in enumerate(result.entries)]
    model_rank: dict[str, int] = {}
    for (rank, _c, _l), _i, entry in ranked:
        model_rank[entry.model] = min(rank, model_rank.get(entry.model, rank))
    ranked.sort(key=lambda r: (model_rank[r[2].model], r[2].model, r[0][0], r[2].target))
    rows = [f"<tr><td class=\"name\">{html_escape(e.model)}</td><td>\u2013</td>"
            f"<td data-v=\"{NOT_ANALYSED[0]}\"><span class=\"chip v-error\">not analysed</span></td>"
            f"<td colspan=\"5\">{html_escape(e.message)}</td></tr>" for e in result.errors]
    rows += [_overview_row(entry, index, verdict) for verdict, index, entry in ranked]
    trend = "vs previous run" if is_audit else "vs base"
    headers = [("model", False), ("target", False), ("worst verdict", False),
               ("failed rules", False), ("latency", True), (f"latency {trend}", True),
               ("energy", True), (f"energy {trend}", True)]
    title = "Models by worst verdict" if is_audit else "Overview"
    return (f"<section class=\"card\" id=\"overview\"><h2>{title}</h2>\n"
            + _table(headers, rows, sortable=True, table_id="overview-table") + "</section>\n")


def _overview_row(entry: Entry, index: int, verdict: tuple[int, str, str]) -> str:
    rank, css, label = verdict
    failed = ", ".join(f"<code>{html_escape(v.rule_id)}</code>"
                       for v in entry.verdicts if v.status == FAIL) or "\u2013"
    cells = [(f"<td class=\"name\"><a href=\"#{entry_anchor(index)}\">"
              f"{html_escape(entry.model)}</a></td>"), f"<td><code>{html_escape(entry.target)}</code></td>",
             f"<td data-v=\"{rank}\"><span class=\"chip {css}\">{label}</span></td>",
             f"<td>{failed}</td>"]
    for metric in ("latency_s", "energy_j"):
        base, head = _totals(entry, metric)
        cells.append(_num(metric, head))
        if entry.head is None:
            cells.append("<td class=\"num\" data-v=\"-Infinity\">removed</td>")
        elif base is None:
            cells.append("<td class=\"num\" data-v=\"-Infinity\">new</td>")
        else:
            cells.append(_delta(metric, base, head))
    return "<tr>" + "".join(cells) + "</tr>"


def _totals(entry: Entry, metric: str) -> tuple[Metric | None, Metric | None]:
    if entry.diff is not None and metric in entry.diff.totals:
        old, new = entry.diff.totals[metric]
        return (old if entry.base else None), (new if entry.head else None)
    base = entry.base.metrics.get(metric) if entry.base else None
    head = entry.head.metrics.get(metric) if entry.head else None
    return base, head


# --- rules ----------------------------------------------------------------------

def rules_table(verdicts: Sequence[Verdict]) -> str:
    """Every rule with its verdict; the findings (layer, message, waiver) under each."""
    if not verdicts:
        return "<p class=\"note\">No rules applied to this model on this target.</p>\n"
    rows = []
    for v in verdicts:
        rows.append(f"<tr class=\"rule\" data-rule=\"{html_escape(v.rule_id)}\" "
                    f"data-verdict=\"{_verdict_word(v)}\"><td><code>{html_escape(v.rule_id)}</code></td>"
                    f"<td>{html_escape(v.severity)}</td><td>{verdict_chip(v)}</td>"
                    f"<td>{html_escape(v.summary)}<br><span class=\"note\">"
                    f"{html_escape(v.description)}</span></td>"
                    f"<td>{html_escape(v.remedy) if v.status != PASS else ''}</td></tr>")
        rows += [_finding_row(f) for f in v.findings]
    headers = [("rule", False), ("severity", False), ("verdict", False), ("summary", False),
               ("remedy", False)]
    return _table(headers, rows, sortable=False)


def _finding_row(finding: Finding) -> str:
    where = "model"
    if finding.layer is not None:
        where = f"layer <span class=\"name\">{html_escape(finding.layer)}</span>"
    waiver = ""
    if finding.status == WAIVED:
        waiver = (f" <em>Waived: {html_escape(finding.waiver_reason)}"
                  f" (until {html_escape(finding.waiver_expires or 'no date')}).</em>")
    return (f"<tr class=\"finding\"><td></td><td colspan=\"4\">{where}: "
            f"{html_escape(finding.message)}{waiver}</td></tr>")


# --- layers ---------------------------------------------------------------------

_LAYER_HEADERS = [("layer", False), ("op", False), ("precision", False), ("bound", False), ("latency", True),
                  ("share of latency", True), ("energy", True), ("utilization", True),
                  ("FLOP/byte", True), ("parameters", True), ("params fit", False)]
_DIFF_HEADERS = [("change", False), ("layer", False), ("op", False), ("base latency", True),
                 ("head latency", True), ("latency change", True), ("head energy", True),
                 ("energy change", True), ("head parameters", True), ("parameters change", True),
                 ("head utilization", True), ("head FLOP/byte", True)]


def layer_table(entry: Entry) -> str:
    """All layers of the head (or the diff's layer pairs when there is a baseline)."""
    if entry.diff is not None and entry.base is not None and entry.head is not None:
        rows = _diff_rows(entry)
        return _table(_DIFF_HEADERS, rows, sortable=True)
    run = entry.head or entry.base
    assert run is not None
    total_s = float(run.metrics.get("latency_s") or 0.0)
    rows = [_layer_row(layer, total_s) for layer in run.layers]
    return _table(_LAYER_HEADERS, rows, sortable=True)


def _layer_row(layer: LayerRecord, total_s: float) -> str:
    m = layer.metrics
    share = float(m.get("latency_s") or 0.0) / total_s if total_s else 0.0
    note = "" if layer.modelled else f" <em>(not modelled: {html_escape(layer.unmodelled_reason)})</em>"
    if layer.fused_label:
        note += f" <span class=\"note\">({html_escape(layer.fused_label)})</span>"
    return ("<tr>" + f"<td class=\"name\">{html_escape(layer.name)}{note}</td>"
            f"<td><code>{html_escape(layer.op_type)}</code></td>"
            f"<td>{html_escape(layer.precision or '-')}</td><td>{html_escape(layer.bound)}</td>"
            + _num("latency_s", m.get("latency_s"))
            + f"<td class=\"num\" data-v=\"{_sort_value(share)}\">{units.fmt_share(share)}</td>"
            + _num("energy_j", m.get("energy_j")) + _num("utilization", m.get("utilization"))
            + _num("arithmetic_intensity", m.get("arithmetic_intensity"))
            + _num("param_bytes", m.get("param_bytes"))
            + f"<td>{'yes' if layer.params_fit else 'no'}</td></tr>")


def _index(run: RunRecord) -> dict[str, LayerRecord]:
    out: dict[str, LayerRecord] = {}
    for layer in run.layers:
        out.setdefault(layer.name, layer)
    return out


def _diff_rows(entry: Entry) -> list[str]:
    assert entry.diff is not None and entry.base is not None and entry.head is not None
    base_layers, head_layers = _index(entry.base), _index(entry.head)
    rows = []
    for change in entry.diff.layers:
        old = base_layers.get(change.base_name) if change.base_name is not None else None
        new = head_layers.get(change.head_name) if change.head_name is not None else None
        name = change.head_name if change.head_name is not None else change.base_name
        renamed = ""
        if old is not None and new is not None and old.name != new.name:
            renamed = f" <span class=\"note\">(was {html_escape(old.name)})</span>"

        def get(layer: LayerRecord | None, metric: str) -> Metric | None:
            return layer.metrics.get(metric) if layer is not None else None

        rows.append(
            f"<tr class=\"ch-{html_escape(change.status)}\"><td>{html_escape(change.status)}</td>"
            f"<td class=\"name\">{html_escape(name or '')}{renamed}</td>"
            f"<td><code>{html_escape(change.op_type)}</code></td>"
            + _num("latency_s", get(old, "latency_s")) + _num("latency_s", get(new, "latency_s"))
            + _delta("latency_s", get(old, "latency_s"), get(new, "latency_s"))
            + _num("energy_j", get(new, "energy_j"))
            + _delta("energy_j", get(old, "energy_j"), get(new, "energy_j"))
            + _num("param_bytes", get(new, "param_bytes"))
            + _delta("param_bytes", get(old, "param_bytes"), get(new, "param_bytes"))
            + _num("utilization", get(new, "utilization"))
            + _num("arithmetic_intensity", get(new, "arithmetic_intensity")) + "</tr>")
    return rows
