"""The metric catalogue: every figure roofgate reports, with its label, unit, direction and
change tolerance, and the one way to write a value or a change of it.

The policy (messages, regression direction, threshold units), every reporter
and the CLI tables read metrics from here, so a figure has one name and one
spelling everywhere: ``1536`` bytes is ``1.50 KiB`` in the terminal, the
pull-request comment, the HTML report, the JUnit XML and a policy message.
The key (``latency_s``) is what records, JSON documents and policy files use;
the label (``latency``) is what people read.

A key that is not catalogued (a field another stage adds later) is still
formatted by its unit suffix (``_bytes``, ``_s``, ``_j``, ``_per_s``,
``_per_j``, ``_share``) and labelled from its stem, so new fields slot in.

Change wording is roofgate's own: a change reads ``worse by 1.05 ms (+77.4%)``,
``better by 8.0 pp`` or ``unchanged``; a change within the metric's tolerance
(``tolerance_rel``, float rounding of a stored baseline) is ``unchanged`` in
every report, and the direction word comes from the metric's direction.

Sits below ``gate.policy`` and ``gate.report``; imports only ``gate.units``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from gate import units

Value = int | float | None

BYTES, COUNT, SECONDS, JOULES, SHARE, PLAIN = "bytes", "count", "seconds", "joules", "share", \
    "plain"
HIGHER, LOWER, NEUTRAL = "higher", "lower", "neutral"

# Baseline snapshots keep 12 significant digits: anything closer is the same value.
DEFAULT_TOLERANCE_REL = 1e-9


@dataclass(frozen=True, slots=True)
class MetricInfo:
    """What one metric is: how to name it, write it and judge a change of it.

    ``better`` is ``higher``, ``lower`` or ``neutral`` (a size such as MACs: a change is
    reported as up/down, and a regression rule treats an increase as worse).
    """

    key: str
    label: str
    quantity: str  # BYTES, COUNT, SECONDS, JOULES, SHARE or PLAIN
    better: str = LOWER
    unit: str = ""  # suffix after an SI prefix for COUNT and PLAIN ('FLOP/s', 'FLOP/B')
    tolerance_rel: float = DEFAULT_TOLERANCE_REL

    @property
    def higher_is_better(self) -> bool:
        return self.better == HIGHER


def _m(key: str, label: str, quantity: str, better: str = LOWER, unit: str = "") -> MetricInfo:
    return MetricInfo(key, label, quantity, better, unit)


_CATALOGUE: tuple[MetricInfo, ...] = (
    _m("layers", "layers", COUNT, NEUTRAL),
    _m("macs", "MACs", COUNT, NEUTRAL),
    _m("flops", "FLOPs", COUNT, NEUTRAL),
    _m("param_count", "parameter count", COUNT, NEUTRAL),
    _m("param_bytes", "parameter size", BYTES),
    _m("max_layer_param_bytes", "largest layer parameter size", BYTES),
    _m("input_bytes", "input size", BYTES),
    _m("output_bytes", "output size", BYTES),
    _m("activation_bytes", "activation size", BYTES),
    _m("bytes_moved", "bytes moved", BYTES),
    _m("arithmetic_intensity", "arithmetic intensity", PLAIN, HIGHER, "FLOP/B"),
    _m("param_reuse", "MACs per parameter byte", PLAIN, HIGHER),
    _m("cycles", "cycles", COUNT),
    _m("utilization", "PE utilization", SHARE, HIGHER),
    _m("compute_s", "compute time", SECONDS),
    _m("memory_s", "memory time", SECONDS),
    _m("overhead_s", "overhead time", SECONDS),
    _m("latency_s", "latency", SECONDS),
    _m("inferences_per_s", "inferences per second", COUNT, HIGHER, "/s"),
    _m("achieved_flops_per_s", "achieved FLOP/s", COUNT, HIGHER, "FLOP/s"),
    _m("peak_flops_share", "share of peak FLOP/s", SHARE, HIGHER),
    _m("param_dram_bytes", "parameter DRAM traffic", BYTES),
    _m("act_dram_bytes", "activation DRAM traffic", BYTES),
    _m("energy_j", "energy", JOULES),
    _m("energy_mac_j", "MAC energy", JOULES),
    _m("energy_buffer_j", "buffer energy", JOULES),
    _m("energy_noc_j", "on-chip network energy", JOULES),
    _m("energy_dram_param_j", "parameter DRAM energy", JOULES),
    _m("energy_dram_act_j", "activation DRAM energy", JOULES),
    _m("energy_static_j", "static energy", JOULES),
    _m("flops_per_j", "FLOPs per joule", COUNT, HIGHER, "FLOP/J"),
    _m("peak_flops_per_j_share", "share of peak FLOPs per joule", SHARE, HIGHER),
    _m("coverage_node_share", "modelled share of nodes", SHARE, HIGHER),
    _m("coverage_work_share", "modelled share of work", SHARE, HIGHER),
    _m("unmodelled_nodes", "unmodelled nodes", COUNT),
    _m("unmodelled_node_share", "unmodelled share of nodes", SHARE),
    _m("unmodelled_work_share", "unmodelled share of work", SHARE),
    # target figures
    _m("peak_flops_per_s", "peak FLOP/s", COUNT, HIGHER, "FLOP/s"),
    _m("peak_flops_per_j", "peak FLOPs per joule", COUNT, HIGHER, "FLOP/J"),
    _m("dram_bytes_per_s", "DRAM bandwidth", COUNT, HIGHER, "B/s"),
    _m("ridge_flop_per_byte", "ridge point", PLAIN, NEUTRAL, "FLOP/B"),
    _m("param_buffer_bytes", "parameter buffer", BYTES, HIGHER),
    _m("activation_buffer_bytes", "activation buffer", BYTES, HIGHER),
    _m("unified_buffer_bytes", "unified buffer", BYTES, HIGHER),
    _m("pe_count", "PEs", COUNT, HIGHER),
    _m("clock_hz", "clock", COUNT, HIGHER, "Hz"),
)
CATALOGUE: dict[str, MetricInfo] = {info.key: info for info in _CATALOGUE}

# Metrics every LayerRecord carries (documented in docs/reports.md).
LAYER_METRICS: tuple[str, ...] = (
    "macs", "flops", "param_count", "param_bytes", "input_bytes", "output_bytes",
    "arithmetic_intensity", "param_reuse", "cycles", "utilization", "compute_s", "memory_s",
    "overhead_s", "latency_s", "param_dram_bytes", "act_dram_bytes", "achieved_flops_per_s",
    "energy_j", "energy_mac_j", "energy_buffer_j", "energy_noc_j", "energy_dram_param_j",
    "energy_dram_act_j", "energy_static_j",
)
# Model totals every RunRecord carries.
MODEL_METRICS: tuple[str, ...] = (
    "layers", "macs", "flops", "param_count", "param_bytes", "max_layer_param_bytes",
    "latency_s", "inferences_per_s", "achieved_flops_per_s", "peak_flops_share", "utilization",
    "energy_j", "energy_mac_j", "energy_buffer_j", "energy_noc_j", "energy_dram_param_j",
    "energy_dram_act_j", "energy_static_j", "flops_per_j", "peak_flops_per_j_share",
    "param_dram_bytes", "act_dram_bytes", "coverage_node_share", "coverage_work_share",
    "unmodelled_nodes",
)
# Target figures every RunRecord carries (for messages and charts).
TARGET_FIGURES: tuple[str, ...] = (
    "peak_flops_per_s", "peak_flops_per_j", "dram_bytes_per_s", "ridge_flop_per_byte",
    "param_buffer_bytes", "activation_buffer_bytes", "unified_buffer_bytes", "pe_count",
    "clock_hz",
)

# The figures a one-line summary of a model x target shows, in this order.
KEY_METRICS: tuple[str, ...] = ("latency_s", "utilization", "param_bytes", "energy_j")
# The costs a reader weighs to call a change better or worse (utilization is a means).
COST_METRICS: tuple[str, ...] = ("latency_s", "param_bytes", "energy_j")

_SUFFIX_QUANTITY = (("_bytes", BYTES, ""), ("_share", SHARE, ""), ("_per_s", COUNT, "/s"),
                    ("_per_j", COUNT, "/J"), ("_s", SECONDS, ""), ("_j", JOULES, ""))


def info(key: str) -> MetricInfo:
    """The catalogue entry of ``key``; an uncatalogued key is described by its unit suffix."""
    known = CATALOGUE.get(key)
    if known is not None:
        return known
    for suffix, quantity, unit in _SUFFIX_QUANTITY:
        if key.endswith(suffix):
            stem = key[: -len(suffix)] or key
            return MetricInfo(key, stem.replace("_", " "), quantity, LOWER, unit)
    return MetricInfo(key, key.replace("_", " "), COUNT, LOWER)


def label(key: str) -> str:
    """The readable name: ``latency`` for ``latency_s``."""
    return info(key).label


def phrase(key: str) -> str:
    """The label with the policy-file key in brackets for a first mention in a message,
    ``latency [latency_s]``; just the key when the label would only repeat it."""
    name = label(key)
    return key if name == key else f"{name} [{key}]"


def higher_is_better(key: str) -> bool:
    """True when a larger value of ``key`` is an improvement."""
    return info(key).higher_is_better


def fmt(key: str, value: Value) -> str:
    """``value`` of metric ``key`` written in its unit (``?`` when unknown)."""
    meta = info(key)
    if meta.quantity == BYTES:
        return units.fmt_bytes(value)
    if meta.quantity == SHARE:
        return units.fmt_share(value)
    if meta.quantity == SECONDS:
        return units.fmt_seconds(value)
    if meta.quantity == JOULES:
        return units.fmt_joules(value)
    if meta.quantity == PLAIN:
        text = units.fmt_plain(value)
        return f"{text} {meta.unit}" if meta.unit and text != units.UNKNOWN else text
    return units.fmt_count(value, meta.unit)


def fmt_amount(key: str, amount: Value) -> str:
    """An unsigned amount of change of ``key``: bytes, seconds, ... or points for a share."""
    if info(key).quantity == SHARE:
        return units.fmt_points(amount).lstrip("+-")
    return fmt(key, None if amount is None else abs(amount))


# --- changes ----------------------------------------------------------------------------

def unchanged(key: str, base: Value, head: Value) -> bool:
    """Equal within the metric's tolerance (the one tolerance every report uses). An unknown
    value (None) equals nothing: an unknown figure always shows, as ``?``."""
    if base is None or head is None:
        return False
    if isinstance(base, int) and isinstance(head, int):
        return base == head
    return math.isclose(float(base), float(head), rel_tol=info(key).tolerance_rel,
                        abs_tol=1e-300)


def relative_change(base: Value, head: Value) -> float | None:
    """(head - base) / |base|, or None when it has no meaning (unknown side, base zero)."""
    if base is None or head is None or base == 0:
        return None
    return (float(head) - float(base)) / abs(float(base))


def direction(key: str, base: Value, head: Value) -> str:
    """``better``, ``worse``, ``up``/``down`` (for neutral metrics), ``unchanged`` or ``?``."""
    if base is None or head is None:
        return units.UNKNOWN
    if unchanged(key, base, head):
        return "unchanged"
    better = info(key).better
    if better == NEUTRAL:
        return "up" if head > base else "down"
    return "better" if (head > base) == (better == HIGHER) else "worse"


def fmt_signed(key: str, base: Value, head: Value) -> str:
    """The compact signed change: ``+77.4%`` (``-8.0 pp`` for shares; the amount when the base
    is zero: ``+1.50 KiB``); ``0%`` within tolerance; ``?`` when a side is unknown."""
    if base is None or head is None:
        return units.UNKNOWN
    if unchanged(key, base, head):
        return "0 pp" if info(key).quantity == SHARE else "0%"
    if info(key).quantity == SHARE:
        return units.fmt_points(float(head) - float(base))
    ratio = relative_change(base, head)
    if ratio is None:
        return ("+" if head > base else "-") + fmt_amount(key, float(head) - float(base))
    return units.fmt_ratio_change(ratio)


def fmt_change(key: str, base: Value, head: Value) -> str:
    """A change in roofgate's words: ``worse by 1.05 ms (+77.4%)``, ``better by 8.0 pp``,
    ``up by 4.19 M (+100%)``, ``unchanged``, or ``?`` when a side is unknown."""
    word = direction(key, base, head)
    if word in ("unchanged", units.UNKNOWN):
        return word
    assert base is not None and head is not None
    amount = fmt_amount(key, float(head) - float(base))
    if info(key).quantity == SHARE:
        return f"{word} by {amount}"
    ratio = relative_change(base, head)
    percent = "from zero" if ratio is None else units.fmt_ratio_change(ratio)
    return f"{word} by {amount} ({percent})"


def impact(key: str, base: Value, head: Value) -> float:
    """The size of a change in the metric's own unit (its absolute difference): what ranks
    changes, so a +1.67 ms convolution outranks a +3100% Relu."""
    if base is None or head is None:
        return 0.0
    return abs(float(head) - float(base))
