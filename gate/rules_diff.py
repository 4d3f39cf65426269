"""What a pull request changes in the gate's own rules, as one line per change.

``check`` judges with the merge base's rules (gate/rules_source.py); the pull
request's versions take effect after merge, so reviewers must see them: which
model globs, targets and policies the config now names, and per policy file
which rules and waivers were added, removed, loosened or otherwise changed.
A change is *loosened* when it lets more through: a higher maximum, a lower
minimum, ``error`` to ``warning``, a check switched off, unanalysable models
allowed, a new waiver.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import fields
from typing import Any, TypeVar

from gate.config import ProjectConfig
from gate.policy.spec import Policy, Rule, Waiver

T = TypeVar("T")

# Rule fields where a larger value lets more through, and where a smaller one does.
_LOOSER_WHEN_HIGHER = ("maximum", "max_change_pct", "max_change_abs", "max_node_share",
                       "max_work_share", "min_layer_macs")
_LOOSER_WHEN_LOWER = ("minimum",)
_LOOSER_WHEN_OFF = ("check_params", "check_activations")
_IGNORED = ("line", "description", "remedy")


def config_changes(base: ProjectConfig | None, head: ProjectConfig | None) -> list[str]:
    """Lines naming every setting of roofgate.yaml that differs between base and head."""
    old, new = _config_view(base), _config_view(head)
    out = []
    for key in sorted(set(old) | set(new)):
        if old.get(key) != new.get(key):
            out.append(f"roofgate.yaml: {key} changed from {_show(old.get(key))} to "
                       f"{_show(new.get(key))}")
    return out


def _config_view(config: ProjectConfig | None) -> dict[str, Any]:
    if config is None:
        return {"file": "absent"}
    view: dict[str, Any] = {"exclude": list(config.exclude), "reports": dict(config.reports),
                            "rules_from": config.rules_from,
                            "waiver_horizon_days": config.waiver_horizon_days}
    for index, group in enumerate(config.groups):
        where = f"models[{index}]"
        view[f"{where}.paths"] = list(group.paths)
        view[f"{where}.targets"] = list(group.targets)
        view[f"{where}.policies"] = list(group.policies)
        view[f"{where}.dims"] = dict(group.dims)
        view[f"{where}.precision"] = group.precision
    return view


def policy_changes(base: Mapping[str, Policy], head: Mapping[str, Policy]) -> list[str]:
    """Lines for policy files added or removed, and per file its rules and waivers."""
    return _keyed_changes(
        base, head,
        removed=lambda name: f"{name}: policy no longer named (loosened: its rules stop applying)",
        added=lambda name: f"{name}: policy newly named",
        changed=lambda name, old, new: [f"{name}: {line}" for line in _one_policy(old, new)])


def _keyed_changes(base: Mapping[str, T], head: Mapping[str, T], *,
                   removed: Callable[[str], str], added: Callable[[str], str],
                   changed: Callable[[str, T, T], list[str]]) -> list[str]:
    """Lines for the keys only in ``base``, only in ``head``, and in both (sorted by key)."""
    out: list[str] = []
    for key in sorted(set(base) | set(head)):
        if key not in head:
            out.append(removed(key))
        elif key not in base:
            out.append(added(key))
        else:
            out += changed(key, base[key], head[key])
    return out


def _one_policy(base: Policy, head: Policy) -> list[str]:
    out = []
    if base.allow_unanalysable != head.allow_unanalysable:
        word = "loosened" if head.allow_unanalysable else "tightened"
        out.append(f"allow_unanalysable {word} ({base.allow_unanalysable} -> "
                   f"{head.allow_unanalysable})")
    if base.targets != head.targets:
        out.append(f"targets changed from {_show(list(base.targets))} to "
                   f"{_show(list(head.targets))}")
    out += _keyed_changes({r.id: r for r in base.rules}, {r.id: r for r in head.rules},
                          removed=lambda rule_id: f"rule {rule_id} removed (loosened)",
                          added=lambda rule_id: f"rule {rule_id} added",
                          changed=lambda _rule_id, old, new: _rule_change(old, new))
    out += _waiver_changes(base.waivers, head.waivers)
    return out


def _rule_change(old: Rule, new: Rule) -> list[str]:
    changed = [f.name for f in fields(Rule) if f.name not in _IGNORED
               and getattr(old, f.name) != getattr(new, f.name)]
    if not changed:
        return []
    looser = any(_looser(name, getattr(old, name), getattr(new, name)) for name in changed)
    parts = ", ".join(f"{name} {_show(getattr(old, name))} -> {_show(getattr(new, name))}"
                      for name in changed)
    return [f"rule {old.id} {'loosened' if looser else 'changed'} ({parts})"]


def _looser(name: str, old: Any, new: Any) -> bool:
    if name == "severity":
        return bool(old == "error" and new != "error")
    if name in _LOOSER_WHEN_OFF:
        return bool(old and not new)
    if name == "scope":
        return True  # a narrower or other scope may skip what was judged: shown as loosened
    if old is None or new is None:
        return new is None and old is not None and name in (*_LOOSER_WHEN_HIGHER,
                                                             *_LOOSER_WHEN_LOWER)
    if name in _LOOSER_WHEN_HIGHER:
        return bool(new > old)
    if name in _LOOSER_WHEN_LOWER:
        return bool(new < old)
    return False


def _waiver_changes(base: Sequence[Waiver], head: Sequence[Waiver]) -> list[str]:
    old = {_waiver_key(w): w for w in base}
    new = {_waiver_key(w): w for w in head}
    out = []
    for key in sorted(set(old) | set(new)):
        if key not in new:
            out.append(f"waiver for {key[0]} on {key[1]} removed")
        elif key not in old:
            waiver = new[key]
            out.append(f"waiver for {key[0]} on {key[1]} added (loosened; until "
                       f"{waiver.expires.isoformat()}, reason: {waiver.reason!r})")
        elif (old[key].expires, old[key].reason) != (new[key].expires, new[key].reason):
            later = new[key].expires > old[key].expires
            out.append(f"waiver for {key[0]} on {key[1]} {'loosened' if later else 'changed'} "
                       f"(until {old[key].expires.isoformat()} -> "
                       f"{new[key].expires.isoformat()})")
    return out


def _waiver_key(waiver: Waiver) -> tuple[str, str]:
    scope = waiver.scope
    where = ", ".join([*scope.models, *scope.targets, *scope.layers]) or "every model"
    return waiver.rule_id, where


def _show(value: Any) -> str:
    if value is None:
        return "(unset)"
    return repr(value) if isinstance(value, str) else str(value)
