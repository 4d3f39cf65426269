"""Read policy YAML files into ``Policy`` values, reporting every problem of a file at once.

Each problem names the file, line, key path and, for typos, a suggestion; the
schema is documented in docs/policies.md. A reference that is not a path names a
built-in policy (``default``, ``strict``, ``nightly``: package data in
``gate/policies/``), the way built-in targets are named. A file is read with the shared
validating reader (``gate.yamlconf``), so alias bombs and non-UTF-8 bytes are
refused the same way as in target profiles.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TypedDict

from gate import metrics
from gate.bundled import bundled_bytes, bundled_names, looks_like_path
from gate.errors import ConfigError
from gate.metrics import LAYER_METRICS, MODEL_METRICS
from gate.policy import spec
from gate.policy.globs import pattern_problem
from gate.policy.spec import Policy, Rule, Scope, Waiver
from gate.yamlconf import Section, YamlDocument, parse_yaml_bytes, read_yaml_file, suggest

POLICY_FORMAT_VERSION = 1
_RULE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
_LAYER_KEYS = ("layers", "exclude_layers", "op_types")
_BUILTIN_PACKAGE = "gate"
_BUILTIN_DIR = "policies"


class _KindFields(TypedDict, total=False):
    """The ``Rule`` fields one kind sets (the rest keep their defaults)."""

    metric: str
    minimum: float | None
    maximum: float | None
    min_layer_macs: int
    check_params: bool
    check_activations: bool
    max_change_pct: float | None
    max_change_abs: float | None
    max_node_share: float | None
    max_work_share: float | None


_FieldReader = Callable[[Section, str], "_KindFields | None"]


def load_policy(name_or_path: str | Path) -> Policy:
    """Load and validate a built-in policy by name or a policy file by path.

    Raises ConfigError listing all the problems (an unknown name lists the built-ins).
    """
    text = str(name_or_path)
    if looks_like_path(text):
        doc = read_yaml_file(text)
    else:
        doc = parse_yaml_bytes(builtin_policy_yaml(text).encode("utf-8"),
                               f"gate/policies/{text}.yaml")
    policy = read_policy(doc)
    doc.raise_if_problems()
    return policy


def builtin_policy_names() -> list[str]:
    """Names of the policies that ship with roofgate, sorted."""
    return bundled_names(_BUILTIN_PACKAGE, _BUILTIN_DIR)


def builtin_policy_yaml(name: str) -> str:
    """The commented YAML of a built-in policy (a starting point to copy and edit)."""
    names = builtin_policy_names()
    if name not in names:
        message = (f"unknown policy '{name}'{suggest(name, names)}; built-in policies: "
                   f"{', '.join(names)}; or give the path of a policy YAML file")
        raise ConfigError([message])
    return bundled_bytes(_BUILTIN_PACKAGE, _BUILTIN_DIR, name).decode("utf-8")


def load_policies(paths: Iterable[str | Path]) -> tuple[Policy, ...]:
    """Load several policy files; problems of all files (and clashing rule ids) raised together."""
    problems: list[str] = []
    policies: list[Policy] = []
    for path in paths:
        try:
            policies.append(load_policy(path))
        except ConfigError as exc:
            problems.extend(exc.problems)
    problems.extend(_clashing_rule_ids(policies))
    if problems:
        raise ConfigError(problems)
    return tuple(policies)


def _clashing_rule_ids(policies: list[Policy]) -> list[str]:
    """Rule ids name JUnit test cases and waivers, so one run may not hold two with one id."""
    seen: dict[str, tuple[str, int]] = {}
    out = []
    for policy in policies:
        for rule in policy.rules:
            if rule.id in seen:
                first_path, first_line = seen[rule.id]
                out.append(f"{policy.path}:{rule.line}: rule id '{rule.id}' is also defined in "
                           f"{first_path}:{first_line}; rename one (ids must be unique per run)")
            else:
                seen[rule.id] = (policy.path, rule.line)
    return out


def read_policy(doc: YamlDocument) -> Policy:
    """Build a Policy from a composed document, recording problems on ``doc``."""
    root = doc.root_mapping()
    version = root.get_int("version", POLICY_FORMAT_VERSION)
    if version != POLICY_FORMAT_VERSION:
        root.bad("version", f"policy format version {version} is not supported; this roofgate "
                            f"reads version {POLICY_FORMAT_VERSION}")
    name = root.get_str("name", Path(doc.path).stem) or Path(doc.path).stem
    description = root.get_str("description", "") or ""
    targets = _patterns(root, "targets")
    allow = bool(root.get_bool("allow_unanalysable", False))
    rules = _read_rules(root)
    waivers = _read_waivers(root, rules)
    root.finish()
    return Policy(name=name, path=doc.path, description=description, rules=tuple(rules),
                  waivers=tuple(waivers), targets=targets, allow_unanalysable=allow)


def _patterns(section: Section, key: str) -> tuple[str, ...]:
    values = section.get_str_list(key, []) or []
    for value in values:
        problem = pattern_problem(value)
        if problem:
            section.bad(key, problem)
    return tuple(values)


def _line(section: Section) -> int:
    return section.node.start_mark.line + 1 if section.node is not None else 0


def _read_rules(root: Section) -> list[Rule]:
    known_problems = len(root.doc.problems)
    sections = root.get_sections("rules", required=True)
    if root.has("rules") and not sections and len(root.doc.problems) == known_problems:
        root.bad("rules", "a policy needs at least one rule")
    rules: list[Rule] = []
    first_line: dict[str, int] = {}
    for section in sections:
        rule = _read_rule(section)
        if rule is None:
            continue
        if rule.id in first_line:
            section.bad("id", f"duplicate rule id '{rule.id}' (first defined at line "
                              f"{first_line[rule.id]})")
            continue
        first_line[rule.id] = rule.line
        rules.append(rule)
    return rules


def _read_rule(sec: Section) -> Rule | None:
    rule_id = sec.get_str("id", required=True)
    kind = sec.get_str("kind", required=True, choices=list(spec.KINDS))
    severity = sec.get_str("severity", spec.ERROR, choices=list(spec.SEVERITIES)) or spec.ERROR
    description = sec.get_str("description", "") or ""
    remedy = sec.get_str("remedy", "") or ""
    level = _read_level(sec, kind)
    scope = _read_scope(sec, level)
    if rule_id is not None and not _RULE_ID.match(rule_id):
        sec.bad("id", f"rule id '{rule_id}' may hold only letters, digits, '-', '_' and '.'")
        rule_id = None
    if kind in _KIND_READERS:
        fields = _KIND_READERS[kind](sec, level)
    else:
        fields = None
        sec.free_keys()  # the kind is unknown: its other keys cannot be judged
    sec.finish()
    if rule_id is None or kind is None or fields is None:
        return None
    return Rule(id=rule_id, kind=kind, severity=severity, description=description, remedy=remedy,
                scope=scope, level=level, line=_line(sec), **fields)


def _read_level(sec: Section, kind: str | None) -> str:
    if kind in (spec.FITS_IN_BUFFER, spec.MAX_UNMODELLED):
        fixed = spec.LAYER if kind == spec.FITS_IN_BUFFER else spec.MODEL
        level = sec.get_str("level", fixed, choices=list(spec.LEVELS)) or fixed
        if level != fixed:
            sec.bad("level", f"{kind} rules are checked at level '{fixed}' only")
        return fixed
    return sec.get_str("level", spec.MODEL, choices=list(spec.LEVELS)) or spec.MODEL


def _read_scope(sec: Section, level: str) -> Scope:
    layer_keys = {key: _patterns(sec, key) for key in _LAYER_KEYS}
    if level == spec.MODEL:
        for key in _LAYER_KEYS:
            if layer_keys[key]:
                sec.bad(key, f"'{key}' applies only to rules with level: layer")
    return Scope(models=_patterns(sec, "models"), exclude_models=_patterns(sec, "exclude_models"),
                 targets=_patterns(sec, "targets"), **layer_keys)


# --- per-kind thresholds: each returns the Rule fields of its kind, or None if unusable ---

def _threshold(sec: Section, key: str, unit: str, *, required: bool) -> float | None:
    if unit == "share":
        return sec.get_share(key, required=required)
    return sec.get_quantity(key, unit, required=required)


def _fields_min_utilization(sec: Section, level: str) -> _KindFields | None:
    minimum = sec.get_share("min", required=True)
    fields: _KindFields = {"minimum": minimum}
    if level == spec.LAYER:
        macs = sec.get_quantity("min_layer_macs", "", 1.0, minimum=0.0)
        fields["min_layer_macs"] = int(macs if macs is not None else 1)
    elif sec.has("min_layer_macs"):
        sec.get_quantity("min_layer_macs", "")
        sec.bad("min_layer_macs", "'min_layer_macs' applies only to rules with level: layer")
    return fields if minimum is not None else None


def _fields_max(unit: str) -> _FieldReader:
    def read(sec: Section, level: str) -> _KindFields | None:
        maximum = _threshold(sec, "max", unit, required=True)
        return {"maximum": maximum} if maximum is not None else None
    return read


def _fields_fits(sec: Section, level: str) -> _KindFields | None:
    check = sec.get_str("check", "both", choices=["params", "activations", "both"]) or "both"
    return {"check_params": check in ("params", "both"),
            "check_activations": check in ("activations", "both")}


def _read_metric(sec: Section, level: str) -> str | None:
    metric = sec.get_str("metric", required=True)
    if metric is None:
        return None
    names = list(MODEL_METRICS if level == spec.MODEL else LAYER_METRICS)
    if metric not in names:
        other = LAYER_METRICS if level == spec.MODEL else MODEL_METRICS
        hint = (f" (it is a {'layer' if level == spec.MODEL else 'model'} metric: set level)"
                if metric in other else suggest(metric, names))
        sec.bad("metric", f"unknown {level} metric '{metric}'{hint}; "
                          "docs/policies.md lists the metrics")
        return None
    return metric


def _fields_regression(sec: Section, level: str) -> _KindFields | None:
    metric = _read_metric(sec, level)
    if metric is None:
        for key in ("max_increase_pct", "max_increase_abs", "max_decrease_pct", "max_decrease_abs"):
            sec.get_str(key)  # mark known; values cannot be checked without the metric
        return None
    good, bad = (("decrease", "increase") if metrics.higher_is_better(metric)
                 else ("increase", "decrease"))
    for key in (f"max_{bad}_pct", f"max_{bad}_abs"):
        if sec.has(key):
            sec.get_str(key)
            sec.bad(key, f"'{metric}' is better {'higher' if good == 'decrease' else 'lower'}, "
                         f"so its regression is "
                         f"{'a decrease' if good == 'decrease' else 'an increase'}: "
                         f"use 'max_{good}_{key[-3:]}'")
    pct = sec.get_percent(f"max_{good}_pct", minimum=0.0)
    unit = spec.metric_unit(metric)
    absolute = (sec.get_share(f"max_{good}_abs") if unit == "share"
                else sec.get_quantity(f"max_{good}_abs", unit))
    if pct is None and absolute is None:
        sec.bad("metric", f"give 'max_{good}_pct' and/or 'max_{good}_abs' for '{metric}'")
        return None
    return {"metric": metric, "max_change_pct": pct, "max_change_abs": absolute}


def _fields_unmodelled(sec: Section, level: str) -> _KindFields | None:
    work = sec.get_share("max_work_share")
    nodes = sec.get_share("max_node_share")
    if work is None and nodes is None:
        sec.bad("kind", "give 'max_work_share' and/or 'max_node_share' (e.g. '0%')")
        return None
    return {"max_work_share": work, "max_node_share": nodes}


def _fields_metric_limit(sec: Section, level: str) -> _KindFields | None:
    metric = _read_metric(sec, level)
    if metric is None:
        sec.get_str("min"), sec.get_str("max")  # mark known; their unit depends on the metric
        return None
    unit = spec.metric_unit(metric)
    minimum = _threshold(sec, "min", unit, required=False)
    maximum = _threshold(sec, "max", unit, required=False)
    if minimum is None and maximum is None:
        sec.bad("metric", f"give 'min' and/or 'max' for '{metric}'")
        return None
    return {"metric": metric, "minimum": minimum, "maximum": maximum}


_KIND_READERS: dict[str, _FieldReader] = {
    spec.MIN_UTILIZATION: _fields_min_utilization,
    spec.MAX_PARAM_DRAM: _fields_max("B"),
    spec.FITS_IN_BUFFER: _fields_fits,
    spec.MAX_LATENCY: _fields_max("s"),
    spec.MAX_ENERGY: _fields_max("J"),
    spec.MAX_REGRESSION: _fields_regression,
    spec.MAX_UNMODELLED: _fields_unmodelled,
    spec.METRIC_LIMIT: _fields_metric_limit,
}


# --- waivers ------------------------------------------------------------------

def _read_waivers(root: Section, rules: list[Rule]) -> list[Waiver]:
    by_id = {rule.id: rule for rule in rules}
    out = []
    for sec in root.get_sections("waivers"):
        waiver = _read_waiver(sec, by_id)
        if waiver is not None:
            out.append(waiver)
    return out


def _read_waiver(sec: Section, rules: dict[str, Rule]) -> Waiver | None:
    rule_id = sec.get_str("rule", required=True)
    models = _patterns(sec, "models")
    if not sec.has("models"):
        sec.bad("models", "required key is missing (use '**' to waive the rule for every model)")
    targets = _patterns(sec, "targets")
    layers = _patterns(sec, "layers")
    reason = (sec.get_str("reason", required=True) or "").strip()
    if sec.has("reason") and not reason:
        sec.bad("reason", "a waiver needs a reason (why the rule may fail, and who decided)")
    expires = sec.get_date("expires", required=True)
    sec.finish()
    rule = rules.get(rule_id) if rule_id else None
    if rule_id is not None and rule is None:
        hint = suggest(rule_id, list(rules))
        sec.bad("rule", f"no rule with id '{rule_id}' in this policy{hint}")
    if rule is not None and layers and rule.level == spec.MODEL:
        sec.bad("layers",
                f"rule '{rule_id}' checks the whole model; its waivers cannot name layers")
    if rule is None or not reason or expires is None or not sec.has("models"):
        return None
    return Waiver(rule_id=rule.id, scope=Scope(models=models, targets=targets, layers=layers),
                  reason=reason, expires=expires, line=_line(sec))
