"""What a policy file says, as frozen dataclasses: rules, waivers and the policy itself.

The loader (``gate.policy.load``) builds these from YAML; the evaluator
(``gate.policy.evaluate``) reads them. Thresholds are stored in base units
(fractions for shares, bytes, seconds, joules) whatever the file wrote.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

from gate import metrics
from gate.policy.globs import match_any, match_model

ERROR = "error"
WARNING = "warning"
SEVERITIES = (ERROR, WARNING)

MODEL = "model"
LAYER = "layer"
LEVELS = (MODEL, LAYER)

# Rule kinds (the ``kind:`` key). Names are roofgate's own.
MIN_UTILIZATION = "min_utilization"
MAX_PARAM_DRAM = "max_param_dram"
FITS_IN_BUFFER = "fits_in_buffer"
MAX_LATENCY = "max_latency"
MAX_ENERGY = "max_energy"
MAX_REGRESSION = "max_regression"
MAX_UNMODELLED = "max_unmodelled"
METRIC_LIMIT = "metric_limit"
KINDS = (MIN_UTILIZATION, MAX_PARAM_DRAM, FITS_IN_BUFFER, MAX_LATENCY, MAX_ENERGY,
         MAX_REGRESSION, MAX_UNMODELLED, METRIC_LIMIT)

def metric_unit(metric: str) -> str:
    """How a metric's thresholds are written in a policy file: 'share', 'B', 's', 'J', or ''
    (a plain number), from the metric catalogue."""
    return {metrics.SHARE: "share", metrics.BYTES: "B", metrics.SECONDS: "s",
            metrics.JOULES: "J"}.get(metrics.info(metric).quantity, "")


@dataclass(frozen=True, slots=True)
class Scope:
    """Where a rule (or a waiver) applies: model path globs, target names, layers, op types.

    Empty ``models``/``targets``/``layers``/``op_types`` mean "all".
    """

    models: tuple[str, ...] = ()
    exclude_models: tuple[str, ...] = ()
    targets: tuple[str, ...] = ()
    layers: tuple[str, ...] = ()
    exclude_layers: tuple[str, ...] = ()
    op_types: tuple[str, ...] = ()

    def covers_model(self, model: str, target: str) -> bool:
        if self.models and not any(match_model(p, model) for p in self.models):
            return False
        if any(match_model(p, model) for p in self.exclude_models):
            return False
        return not self.targets or match_any(self.targets, target)

    def covers_layer(self, name: str, op_type: str) -> bool:
        if self.layers and not match_any(self.layers, name):
            return False
        if self.exclude_layers and match_any(self.exclude_layers, name):
            return False
        return not self.op_types or match_any(self.op_types, op_type)


@dataclass(frozen=True, slots=True)
class Rule:
    """One rule of a policy. Only the fields of its ``kind`` are set; the rest keep defaults."""

    id: str
    kind: str
    severity: str
    description: str  # "" -> generated from the thresholds
    remedy: str  # "" -> the kind's default remedy
    scope: Scope
    level: str = MODEL
    line: int = 0  # where the rule starts in its file (for messages)
    metric: str = ""  # max_regression, metric_limit
    minimum: float | None = None  # min_utilization, metric_limit (min)
    maximum: float | None = None  # max_* limits, metric_limit (max)
    min_layer_macs: int = 1  # min_utilization at layer level: smaller layers are skipped
    check_params: bool = True  # fits_in_buffer
    check_activations: bool = True  # fits_in_buffer
    max_change_pct: float | None = None  # max_regression: worst allowed change in percent
    max_change_abs: float | None = None  # max_regression: worst allowed change in base units
    max_node_share: float | None = None  # max_unmodelled: unmodelled share of nodes
    max_work_share: float | None = None  # max_unmodelled: unmodelled share of work


@dataclass(frozen=True, slots=True)
class Waiver:
    """Permission to fail one rule on some models/layers until ``expires`` (inclusive)."""

    rule_id: str
    scope: Scope  # models/targets/layers; no layers -> every finding of the model
    reason: str
    expires: date
    line: int = 0

    def label(self) -> str:
        return f"waiver for {self.rule_id} (line {self.line})"


@dataclass(frozen=True, slots=True)
class Policy:
    """One policy file: rules, waivers and how to treat models that cannot be analysed."""

    name: str
    path: str
    description: str
    rules: tuple[Rule, ...]
    waivers: tuple[Waiver, ...] = ()
    targets: tuple[str, ...] = ()  # target names/globs the policy applies to; () = all
    allow_unanalysable: bool = False

    def applies_to_target(self, target: str) -> bool:
        return not self.targets or match_any(self.targets, target)

    def rule(self, rule_id: str) -> Rule | None:
        for rule in self.rules:
            if rule.id == rule_id:
                return rule
        return None
