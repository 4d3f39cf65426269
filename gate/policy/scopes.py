"""Scopes that match nothing: a typo in a policy must not switch a rule off in silence.

A policy (``targets:``) or a rule (``targets``, ``models``, ``op_types``) whose
pattern matches nothing this run could ever judge is a configuration error
(exit 2) with a "did you mean". What "could ever" means per kind:

* **targets**: the targets of this run (every model group's, after flags).
* **models**: the model files the run knows: every model file of the
  repository for ``check`` (not only the changed ones: a rule for another
  folder is no typo because this pull request did not touch it), the zoo for
  ``audit``, the given files for ``evaluate``.
* **op types**: every op type roofgate knows (its cost functions and the
  ONNX operator set) plus the op types of the run, so a rule for an op that a
  change merely did not contain is no error, while ``Convv`` is.

A waiver's ``targets`` and ``models`` are checked the same way: a waiver whose
scope matches nothing this run could judge is a typo (or names a model or target
since renamed), and its author believes a finding is waived that is not. Its
``layers`` are not checked here (layer names are only known after analysis; a
waiver that matched no finding is reported as unused).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from functools import lru_cache

from gate.errors import near_name
from gate.policy.globs import match_any, match_model
from gate.policy.spec import Policy

_RULE_FIX = "fix the pattern (a scope that matches nothing switches the rule off)"
_WAIVER_FIX = "fix the pattern (a waiver that matches nothing waives nothing) or remove it"


def scope_problems(policies: Sequence[Policy], *, targets: Iterable[str],
                   models: Iterable[str], op_types: Iterable[str] = ()) -> list[str]:
    """One line per pattern that matches nothing (file, rule, key, pattern, did you mean)."""
    target_set = sorted(set(targets))
    model_set = sorted(set(models))
    ops = sorted(_op_types_for([pattern for policy in policies for rule in policy.rules
                                for pattern in rule.scope.op_types]) | set(op_types))
    problems = []
    for policy in policies:
        problems += _unmatched(policy.path, "targets", policy.targets, target_set, _name_match)
        for rule in policy.rules:
            where = f"{policy.path}:{rule.line}: rules[{rule.id}]"
            problems += _unmatched(where, "targets", rule.scope.targets, target_set, _name_match)
            problems += _unmatched(where, "models", rule.scope.models, model_set, match_model)
            problems += _unmatched(where, "op_types", rule.scope.op_types, ops, _name_match)
        for waiver in policy.waivers:
            where = f"{policy.path}:{waiver.line}: waivers[{waiver.rule_id}]"
            problems += _unmatched(where, "targets", waiver.scope.targets, target_set,
                                   _name_match, _WAIVER_FIX)
            problems += _unmatched(where, "models", waiver.scope.models, model_set, match_model,
                                   _WAIVER_FIX)
    return problems



def _name_match(pattern: str, name: str) -> bool:
    return match_any((pattern,), name)


def _unmatched(where: str, key: str, patterns: Sequence[str], known: Sequence[str],
               matches: Callable[[str, str], bool], fix: str = _RULE_FIX) -> list[str]:
    out = []
    for pattern in patterns:
        if any(matches(pattern, name) for name in known):
            continue
        what = {"targets": "target of this run", "models": "model file of this run",
                "op_types": "known op type"}[key]
        out.append(f"{where}.{key}: '{pattern}' matches no {what}{_did_you_mean(pattern, known)}; "
                   f"{fix}")
    return out


def _did_you_mean(pattern: str, known: Sequence[str]) -> str:
    near = near_name(pattern, known)
    if near:
        return f" (did you mean '{near}'?)"
    shown = ", ".join(known[:5]) + (", ..." if len(known) > 5 else "")
    return f" (known: {shown})" if known else ""


# Op types scopes often name, all in the ONNX operator sets (a test checks this against
# onnx). Why: a pattern that matches one of them is checked without importing onnx,
# which would cost the parent process of a parallel run 0.1 s it otherwise never pays.
COMMON_OP_TYPES = frozenset({
    "Add", "AveragePool", "BatchNormalization", "Concat", "Conv", "ConvInteger",
    "ConvTranspose", "Einsum", "Gemm", "GlobalAveragePool", "GRU", "LayerNormalization",
    "LSTM", "MatMul", "MatMulInteger", "MaxPool", "Mul", "QLinearConv", "QLinearMatMul",
    "Relu", "Reshape", "Resize", "RNN", "Sigmoid", "Softmax", "Tanh", "Transpose",
})


def _op_types_for(patterns: Sequence[str]) -> frozenset[str]:
    """The op types to check ``patterns`` against: the common ones when each pattern
    matches one of them, else every known op type."""
    if all(any(_name_match(p, op) for op in COMMON_OP_TYPES) for p in patterns):
        return COMMON_OP_TYPES
    return known_op_types()


@lru_cache(maxsize=1)
def known_op_types() -> frozenset[str]:
    """Op types with a cost function, and every op of the ONNX operator sets."""
    import onnx.defs

    from gate.ops import modelled_op_types  # importing gate.ops registers every cost function

    names = {op for _, op in modelled_op_types()}
    names |= {schema.name for schema in onnx.defs.get_all_schemas_with_history()}
    return frozenset(names)
