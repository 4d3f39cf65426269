"""The max_regression check: a metric may not get worse than the baseline by more than allowed.

Model level compares the totals; layer level compares layers the one layer
matcher (``gate.diff``) paired (by name, or by signature when a layer was renamed). Added and removed layers
are not regressions of an existing layer and are ignored here: their cost
shows in the model totals, which a model-level rule limits.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from gate import metrics
from gate.diff import diff_runs
from gate.policy import spec
from gate.policy.rules import Breach, Outcome, remedy_of
from gate.policy.spec import Rule
from gate.policy.thresholds import regression_bound, regression_exceeds, worsening
from gate.records import Metric, RunRecord
from gate.result import UNKNOWN_REMEDY, RunDiff


@dataclass(frozen=True, slots=True)
class _Pair:
    label: str  # 'Model' or "Layer 'conv5' (Conv)"
    layer: str | None
    base: Metric
    head: Metric


def allowed_text(rule: Rule) -> str:
    """'+5% and +0.2 ms' (or '-5%' for a metric that is better higher)."""
    sign = "-" if metrics.higher_is_better(rule.metric) else "+"
    parts = []
    if rule.max_change_pct is not None:
        parts.append(f"{sign}{rule.max_change_pct:g}%")
    if rule.max_change_abs is not None:
        parts.append(f"{sign}{metrics.fmt_amount(rule.metric, rule.max_change_abs)}")
    return " and ".join(parts)


def check_max_regression(rule: Rule, head: RunRecord, base: RunRecord | None,
                         diff: RunDiff | None, *, base_from_git: bool = False) -> Outcome:
    if base is None:
        return Outcome((), 0, "", "no baseline for this model and target; regression not checked")
    pairs = _model_pairs(rule, head, base, diff) if rule.level == spec.MODEL else \
        _layer_pairs(rule, head, base, diff)
    if rule.level == spec.MODEL and not pairs:
        return Outcome((), 0, "", f"the baseline has no '{rule.metric}' (older roofgate?); "
                                  "regression not checked: refresh the baseline")
    if rule.level == spec.MODEL and any(p.base is None or p.head is None for p in pairs):
        # an unknown head total fails the built-in not-costed rule; say so, never "within"
        return Outcome((), 0, "", f"{metrics.label(rule.metric)} unknown on one side (a model "
                                  "not costed); regression not checked")
    better_higher = metrics.higher_is_better(rule.metric)
    allowed = allowed_text(rule)
    breaches = []
    for pair in pairs:
        if pair.base is None or pair.head is None:
            unknown = _unknown(rule, pair)
            if unknown is not None:
                breaches.append(unknown)
            continue
        if not regression_exceeds(pair.base, pair.head, higher_is_better=better_higher,
                                  max_pct=rule.max_change_pct, max_abs=rule.max_change_abs):
            continue
        limit = regression_bound(pair.base, higher_is_better=better_higher,
                                 max_pct=rule.max_change_pct, max_abs=rule.max_change_abs)
        change = metrics.fmt_change(rule.metric, pair.base, pair.head)
        text = (f"{pair.label}: {metrics.phrase(rule.metric)} "
                f"{metrics.fmt(rule.metric, pair.base)} -> {metrics.fmt(rule.metric, pair.head)} "
                f"against the baseline, {change}, beyond the allowed {allowed}")
        breaches.append(Breach(
            pair.layer, rule.metric, pair.head, limit,
            f"{text} (worst allowed {metrics.fmt(rule.metric, limit)}): {remedy_of(rule, head, base_from_git=base_from_git)}.",
            text,
            f"{pair.layer or 'model'} {change}",
            # worst = largest absolute worsening, in the metric's unit (impact, not percent)
            worsening(pair.base, pair.head, better_higher)))
    what = "model" if rule.level == spec.MODEL else \
        f"{len(pairs)} matched layer{'s' if len(pairs) != 1 else ''}"
    label = metrics.label(rule.metric)
    return Outcome(tuple(breaches), len(pairs), f"regressed in {label} beyond {allowed}",
                   f"{what}: {label} within {allowed} of the baseline")


def _unknown(rule: Rule, pair: _Pair) -> Breach | None:
    """A layer whose figure is unknown on either side cannot be shown not to regress: a
    finding, as an unknown figure is for every limit (never a silent pass)."""
    if pair.layer is None:
        return None
    side = ("base and head" if pair.base is None and pair.head is None
            else "head" if pair.head is None else "base")
    text = (f"{pair.label}: {metrics.phrase(rule.metric)} is unknown in the {side}, so the "
            "regression cannot be checked")
    return Breach(pair.layer, rule.metric, pair.head, None, f"{text}: {UNKNOWN_REMEDY}.", text,
                  f"{pair.layer} ?", math.inf)


def _model_pairs(rule: Rule, head: RunRecord, base: RunRecord,
                 diff: RunDiff | None) -> list[_Pair]:
    if diff is not None and rule.metric in diff.totals:
        before, after = diff.totals[rule.metric]
        return [_Pair("Model", None, before, after)]
    if rule.metric not in head.metrics or rule.metric not in base.metrics:
        return []  # an older baseline without this metric: nothing to compare
    return [_Pair("Model", None, base.metrics[rule.metric], head.metrics[rule.metric])]


def _layer_pairs(rule: Rule, head: RunRecord, base: RunRecord,
                 diff: RunDiff | None) -> list[_Pair]:
    """Matched layers in scope, with the metric's base and head values.

    The layers are paired by the one matcher (``gate.diff``); without a diff
    given, it is computed here. The diff lists layers in head order, so the
    k-th change with a head side is ``head.layers[k]`` (no search by name).
    """
    if diff is None:
        diff = diff_runs(base, head)
    pairs = []
    head_index = -1
    for change in diff.layers:
        if change.head_name is not None:
            head_index += 1
        if change.head_name is None or change.base_name is None:
            continue  # added or removed
        if not rule.scope.covers_layer(change.head_name, change.op_type):
            continue
        if rule.metric in change.deltas:
            before, after = change.deltas[rule.metric]
        else:  # unchanged in this metric
            layer = head.layers[head_index]
            if rule.metric not in layer.metrics:
                continue
            before = after = layer.metrics[rule.metric]
        pairs.append(_Pair(_label(change.head_name, change.op_type, change.base_name),
                           change.head_name, before, after))
    return pairs


def _label(head_name: str, op_type: str, base_name: str) -> str:
    renamed = f", was '{base_name}'" if base_name != head_name else ""
    return f"Layer '{head_name}' ({op_type}{renamed})"
