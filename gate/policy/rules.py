"""One pure check per rule kind: a rule and the records in, the places it fails out.

A check never applies waivers or builds Verdicts (``gate.policy.evaluate``
does); it returns an ``Outcome``: the breaches found, how many places were
checked, and the one-line phrases the summary is made of. Messages are full
sentences naming the layer, the metric, the value, the limit and a remedy.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from gate import metrics, units
from gate.policy import spec
from gate.policy.spec import Rule
from gate.policy.thresholds import above_maximum, below_minimum, unmodelled_share
from gate.records import LayerRecord, Metric, RunRecord
from gate.result import UNKNOWN_REMEDY, RunDiff

DEFAULT_REMEDIES = {
    spec.MIN_UTILIZATION: "match channel counts to the PE array (multiples of its rows and "
                          "columns), fuse small layers, or lower the limit",
    spec.MAX_PARAM_DRAM: "{shrink} so the parameters stay in the on-chip {param_buffer}, or raise "
                         "the limit",
    spec.MAX_LATENCY: "speed up the slowest layers{quantize_or}, or raise the limit",
    spec.MAX_ENERGY: "cut DRAM traffic and MACs in the costliest layers{quantize_or}, or raise "
                     "the limit",
    spec.MAX_REGRESSION: "check that the change is intended; if it is, raise the limit{refresh}",
    spec.MAX_UNMODELLED: "size the inputs with --shape or --dim (the notes say which), add "
                         "cost functions for these op types, replace them with modelled ops, "
                         "or raise the limit",
    spec.METRIC_LIMIT: "change the model or adjust the limit",
}
# fits_in_buffer suggests fixes for what the rule checks: (params, activations) -> remedy.
FITS_REMEDIES = {
    (True, False): "{shrink}, split the layer, or choose a target with a larger {param_buffer}",
    (False, True): "tile the layer, lower the input resolution or batch, or choose a target "
                   "with a larger {act_buffer}",
    (True, True): "{shrink} or split the layer (parameters); tile it or lower the input "
                  "resolution or batch (activations); or choose a target with larger "
                  "on-chip buffers",
}
# Precisions at or below 8 bits: suggesting int8 quantization to these would be no advice.
_LOW_PRECISIONS = frozenset({"int8", "uint8", "int4", "uint4", "int2", "binary"})


@dataclass(frozen=True, slots=True)
class Breach:
    """One place a rule fails, before waivers are applied."""

    layer: str | None
    metric: str
    value: Metric
    limit: Metric
    message: str
    headline: str  # the finding without its remedy: a model-level summary line
    short: str  # 'conv5 12.4%': the 'worst' part of a layer-level summary
    badness: float  # how far past the limit, for picking the worst


@dataclass(frozen=True, slots=True)
class Outcome:
    breaches: tuple[Breach, ...]
    checked: int  # layers checked (layer level) or 1 (model level); 0 = nothing to check
    fail_phrase: str  # 'below 30% utilization': summary after '<n> layers'
    pass_summary: str  # the one line when nothing fails


def remedy_of(rule: Rule, head: RunRecord | None = None, *, base_from_git: bool = False) -> str:
    """The one remedy of a rule on a run: its own text, or its kind's default fitted to the run.

    The default does not suggest quantizing to int8 a run already at 8 bits or
    less, names the unified buffer on a target that has one, and says "refresh
    the baseline" only where the baseline is a snapshot file (``check`` reads
    its base from git, which the merge itself refreshes). Every finding's
    message ends with it and the Verdict carries it, so reporters show it once.
    """
    if rule.remedy:
        return rule.remedy
    template = (FITS_REMEDIES[(rule.check_params, rule.check_activations)]
                if rule.kind == spec.FITS_IN_BUFFER else DEFAULT_REMEDIES[rule.kind])
    return template.format(**_remedy_words(head, base_from_git))


def _remedy_words(head: RunRecord | None, base_from_git: bool) -> dict[str, str]:
    low = head is not None and head.precision.lower() in _LOW_PRECISIONS
    unified = head is not None and bool(head.target_figures.get("unified_buffer_bytes"))
    return {
        "shrink": "prune the weights" if low else "quantize the weights to int8",
        "quantize_or": "" if low else ", quantize",
        "param_buffer": "unified buffer" if unified else "parameter buffer",
        "act_buffer": "unified buffer" if unified else "activation buffer",
        "refresh": "" if base_from_git else " or refresh the baseline snapshot",
    }


def _layer_label(layer: LayerRecord) -> str:
    return f"Layer '{layer.name}' ({layer.op_type})"


def _scoped_layers(rule: Rule, head: RunRecord) -> list[LayerRecord]:
    return [layer for layer in head.layers if rule.scope.covers_layer(layer.name, layer.op_type)]


def _model_value(run: RunRecord, metric: str) -> Metric:
    from gate.errors import InputError  # local: only needed on malformed records

    if metric not in run.metrics:
        raise InputError(f"the record of {run.model} on {run.target} has no metric '{metric}'; "
                         "regenerate it (baseline snapshot from an older roofgate?)")
    return run.metrics[metric]


def _layer_value(run: RunRecord, layer: LayerRecord, metric: str) -> Metric:
    from gate.errors import InputError

    if metric not in layer.metrics:
        raise InputError(f"layer '{layer.name}' of {run.model} on {run.target} has no metric "
                         f"'{metric}'; regenerate the record")
    return layer.metrics[metric]


def _ratio(value: float, limit: float, lower_is_bad: bool) -> float:
    if lower_is_bad:
        return (limit - value) / limit if limit else 1.0
    return (value - limit) / limit if limit else float(value > 0)


def _top_layers(run: RunRecord, metric: str, count: int = 3) -> str:
    ranked = sorted(run.layers, key=lambda layer: layer.metrics.get(metric) or 0, reverse=True)
    parts = [f"{layer.name} {metrics.fmt(metric, layer.metrics.get(metric))}"
             for layer in ranked[:count] if (layer.metrics.get(metric) or 0) > 0]
    return f" (largest: {', '.join(parts)})" if parts else ""


# --- generic limit on one metric (several kinds are this with a fixed metric) ---------------

def _limit_check(rule: Rule, head: RunRecord, metric: str, what: str,
                 layer_filter: Callable[[LayerRecord], bool] = lambda layer: True,
                 what_in_message: str = "") -> Outcome:
    """Compare ``metric`` with rule.minimum / rule.maximum at the rule's level.

    ``what`` names the metric in summaries; ``what_in_message`` (default ``what``) in each
    finding's sentence, where it may add the policy-file key.
    """
    named = what_in_message or what
    remedy = remedy_of(rule, head)
    bounds: list[tuple[str, float, bool]] = []  # (name, limit, lower values are bad)
    if rule.minimum is not None:
        bounds.append(("minimum", rule.minimum, True))
    if rule.maximum is not None:
        bounds.append(("maximum", rule.maximum, False))

    def judge(value: Metric, label: str, short_name: str) -> Breach | None:
        if value is None:  # unknown: a limit it cannot be shown to meet is not met
            text = f"{label}: {named} is unknown, so the limit cannot be checked"
            return Breach(None if label == "Model" else short_name, metric, value,
                          bounds[0][1] if bounds else None,
                          f"{text}: {UNKNOWN_REMEDY}.", text, f"{short_name} ?", math.inf)
        for name, limit, low in bounds:
            failed = below_minimum(value, limit) if low else above_maximum(value, limit)
            if failed:
                relation = "is below the" if low else "exceeds the"
                text = (f"{label}: {named} {metrics.fmt(metric, value)} {relation} "
                        f"{metrics.fmt(metric, limit)} {name}")
                extra = _top_layers(head, metric) if label == "Model" and not low else ""
                return Breach(None if label == "Model" else short_name, metric, value, limit,
                              f"{text}{extra}: {remedy}.", text,
                              f"{short_name} {metrics.fmt(metric, value)}",
                              _ratio(value, limit, low))
        return None

    limits = " and ".join(f"{'at least' if low else 'at most'} {metrics.fmt(metric, limit)}"
                          for _, limit, low in bounds)
    past = " or ".join(f"{'below' if low else 'above'} {metrics.fmt(metric, limit)}"
                       for _, limit, low in bounds)  # 'above 1 ms', not 'outside at most 1 ms'
    if rule.level == spec.MODEL:
        value = _model_value(head, metric)
        breach = judge(value, "Model", "model")
        return Outcome((breach,) if breach else (), 1, f"{what} {past}",
                       f"{what} {metrics.fmt(metric, value)}, limit {limits}")
    layers = [layer for layer in _scoped_layers(rule, head) if layer_filter(layer)]
    found = [judge(_layer_value(head, layer, metric), _layer_label(layer), layer.name)
             for layer in layers]
    breaches = tuple(b for b in found if b is not None)
    return Outcome(breaches, len(layers), f"with {what} {past}",
                   f"{len(layers)} layer{'s' if len(layers) != 1 else ''} checked, "
                   f"{what} {limits}")


def check_min_utilization(rule: Rule, head: RunRecord, base: RunRecord | None,
                          diff: RunDiff | None) -> Outcome:
    """PE-array utilization at least ``min``; layers off the array or under ``min_layer_macs``
    are skipped (utilization is 0 off the array by definition, and tiny layers cannot fill it)."""
    def on_array(layer: LayerRecord) -> bool:
        return (layer.modelled and layer.engine == "array"
                and (layer.metrics.get("macs") or 0) >= max(rule.min_layer_macs, 1))

    if rule.level == spec.MODEL and not any(on_array(layer) for layer in head.layers):
        return Outcome((), 0, "", "no layer runs on the PE array; utilization not checked")
    outcome = _limit_check(rule, head, "utilization", "utilization", on_array)
    limit = units.fmt_share(rule.minimum or 0.0)
    if rule.level == spec.LAYER:
        return Outcome(outcome.breaches, outcome.checked, f"below {limit} utilization",
                       f"{outcome.checked} array layer{'s' if outcome.checked != 1 else ''} with "
                       f">= {metrics.fmt('macs', rule.min_layer_macs)} MACs at or above "
                       f"{limit} utilization")
    return outcome


def check_max_param_dram(rule: Rule, head: RunRecord, base: RunRecord | None,
                         diff: RunDiff | None) -> Outcome:
    return _limit_check(rule, head, "param_dram_bytes", "parameter DRAM traffic per inference")


def check_max_latency(rule: Rule, head: RunRecord, base: RunRecord | None,
                      diff: RunDiff | None) -> Outcome:
    return _limit_check(rule, head, "latency_s", "latency per inference")


def check_max_energy(rule: Rule, head: RunRecord, base: RunRecord | None,
                     diff: RunDiff | None) -> Outcome:
    return _limit_check(rule, head, "energy_j", "energy per inference")


def check_metric_limit(rule: Rule, head: RunRecord, base: RunRecord | None,
                       diff: RunDiff | None) -> Outcome:
    return _limit_check(rule, head, rule.metric, metrics.label(rule.metric),
                        what_in_message=metrics.phrase(rule.metric))


def check_fits_in_buffer(rule: Rule, head: RunRecord, base: RunRecord | None,
                         diff: RunDiff | None) -> Outcome:
    """Each layer's parameters / activations fit the target's on-chip buffers (the cost
    model decides whether they fit; this check reports it)."""
    param_buffer = head.target_figures.get("param_buffer_bytes", 0)
    act_buffer = head.target_figures.get("activation_buffer_bytes", 0)
    unified = bool(head.target_figures.get("unified_buffer_bytes"))
    param_kind, act_kind = ("unified", "unified") if unified else ("parameter", "activation")
    layers = _scoped_layers(rule, head)
    remedy = remedy_of(rule, head)
    breaches: list[Breach] = []
    for layer in layers:
        if rule.check_params and not layer.params_fit:
            value = layer.metrics.get("param_bytes", 0)
            breaches.append(_buffer_breach(layer, "param_bytes", value, "parameters",
                                           param_buffer, param_kind, head.target, remedy))
        if rule.check_activations and layer.activations_fit is None:
            breaches.append(_unknown_breach(layer, "activation_bytes",
                                            "input and output activation size"))
        elif rule.check_activations and not layer.activations_fit:
            value = (layer.metrics.get("input_bytes") or 0) + (layer.metrics.get("output_bytes") or 0)
            breaches.append(_buffer_breach(layer, "activation_bytes", value,
                                           "input and output activations", act_buffer,
                                           act_kind, head.target, remedy))
    what = {(True, True): "parameters and activations", (True, False): "parameters",
            (False, True): "activations"}[(rule.check_params, rule.check_activations)]
    fail_what = what.replace(" and ", " or ")
    return Outcome(tuple(breaches), len(layers), f"whose {fail_what} do not fit on-chip buffers",
                   f"{len(layers)} layer{'s' if len(layers) != 1 else ''} checked, {what} fit "
                   "on-chip buffers")


def _unknown_breach(layer: LayerRecord, metric: str, what: str) -> Breach:
    """A layer whose figure is unknown: a limit it cannot be shown to meet is not met (the
    convention of every rule, as for unknown model totals)."""
    text = f"{_layer_label(layer)}: {what} is unknown, so the limit cannot be checked"
    return Breach(layer.name, metric, None, None, f"{text}: {UNKNOWN_REMEDY}.", text,
                  f"{layer.name} ?", math.inf)


def _buffer_breach(layer: LayerRecord, metric: str, value: Metric, what: str, buffer: Metric,
                   buffer_kind: str, target: str, remedy: str) -> Breach:
    """One layer whose ``what`` (``value`` bytes) exceed the target's ``buffer_kind`` buffer."""
    text = (f"{_layer_label(layer)}: {what} {units.fmt_bytes(value)} exceed the "
            f"{units.fmt_bytes(buffer)} {buffer_kind} buffer of {target}")
    return Breach(layer.name, metric, value, buffer, f"{text}: {remedy}.", text,
                  f"{layer.name} {units.fmt_bytes(value)}",
                  _ratio(float(value or 0), float(buffer or 0), False))


def check_max_unmodelled(rule: Rule, head: RunRecord, base: RunRecord | None,
                         diff: RunDiff | None) -> Outcome:
    """The share of the model roofgate cannot cost stays under the limit."""
    ops = _unmodelled_ops(head)
    breaches: list[Breach] = []
    shown: list[str] = []
    for measure, limit in (("work", rule.max_work_share), ("node", rule.max_node_share)):
        if limit is None:
            continue
        value = unmodelled_share(float(_model_value(head, f"coverage_{measure}_share") or 0.0))
        of_what, verb = ("the work", "is") if measure == "work" else ("the nodes", "are")
        shown.append(f"{units.fmt_share(value)} of {of_what} unmodelled (limit {units.fmt_share(limit)})")
        if above_maximum(value, limit):
            text = (f"Model: {units.fmt_share(value)} of {of_what} {verb} in ops roofgate cannot "
                    f"cost, above the {units.fmt_share(limit)} maximum")
            breaches.append(Breach(
                None, f"unmodelled_{measure}_share", value, limit,
                f"{text}{' (' + ops + ')' if ops else ''}; its figures understate the real "
                f"cost: {remedy_of(rule, head)}.", text,
                f"{units.fmt_share(value)} of {of_what}", _ratio(value, limit, False)))
    return Outcome(tuple(breaches), 1, "unmodelled share above the limit", "; ".join(shown))


def _unmodelled_ops(head: RunRecord) -> str:
    """'Add x17, MatMul x17: <reason>; FancyOp x2: no cost function': the unmodelled op types
    grouped by reason, so a reason shared by many op types is written once."""
    groups: dict[str, list[str]] = {}
    for item in head.unmodelled:
        groups.setdefault(item.reason, []).append(f"{item.op_type} x{item.count}")
    return "; ".join(", ".join(ops) + (f": {reason}" if reason else "")
                     for reason, ops in groups.items())


CHECKS: dict[str, Callable[[Rule, RunRecord, RunRecord | None, RunDiff | None], Outcome]] = {
    spec.MIN_UTILIZATION: check_min_utilization,
    spec.MAX_PARAM_DRAM: check_max_param_dram,
    spec.FITS_IN_BUFFER: check_fits_in_buffer,
    spec.MAX_LATENCY: check_max_latency,
    spec.MAX_ENERGY: check_max_energy,
    spec.MAX_UNMODELLED: check_max_unmodelled,
    spec.METRIC_LIMIT: check_metric_limit,
}
