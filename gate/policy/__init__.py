"""Policies: YAML rule files checked against run records, with waivers.

Typical use::

    policies = load_policies(["default", "team.yaml"])   # built-in names or files
    verdicts = evaluate_all(policies, head, base, diff, today=date.today())
    notes = unused_waivers(policies, all_verdicts)         # for GateResult.notes

The schema and every rule kind are documented in docs/policies.md.
"""

from __future__ import annotations

from gate.policy.evaluate import allow_unanalysable, describe, evaluate, evaluate_all
from gate.policy.load import (
    POLICY_FORMAT_VERSION,
    builtin_policy_names,
    builtin_policy_yaml,
    load_policies,
    load_policy,
)
from gate.policy.spec import KINDS, Policy, Rule, Scope, Waiver
from gate.policy.waivers import unused_waivers

__all__ = [
    "KINDS", "POLICY_FORMAT_VERSION", "Policy", "Rule", "Scope", "Waiver",
    "allow_unanalysable", "builtin_policy_names", "builtin_policy_yaml", "describe", "evaluate",
    "evaluate_all", "load_policies", "load_policy",
    "unused_waivers",
]
