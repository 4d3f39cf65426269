"""Target profiles: declarative YAML descriptions of an accelerator, and the built-in ones.

``load_target`` takes a built-in name (``roofgate targets`` lists them) or the
path of a user's YAML file; built-in profiles ship as package data in
``gate/targets/builtin/``.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

from gate.bundled import bundled_bytes, bundled_names, looks_like_path
from gate.errors import InputError
from gate.targets.loader import load_target_file, parse_target_bytes
from gate.targets.spec import TargetProfile
from gate.yamlconf import suggest

__all__ = ["TargetProfile", "builtin_target_names", "builtin_target_yaml", "load_target",
           "load_targets"]

_BUILTIN_PACKAGE = "gate.targets"
_BUILTIN_DIR = "builtin"


def builtin_target_names() -> list[str]:
    """Names of the built-in targets, sorted."""
    return bundled_names(_BUILTIN_PACKAGE, _BUILTIN_DIR)


def builtin_target_yaml(name: str) -> str:
    """The YAML text of a built-in target (what ``roofgate targets show`` prints)."""
    _check_builtin(name)
    return _builtin_bytes(name).decode("utf-8")


def load_target(name_or_path: str | Path) -> TargetProfile:
    """A built-in target by name, or a user's target file by path.

    Anything that looks like a path (has a folder separator or a .yaml/.yml
    suffix, or is an existing file) is read as a file; otherwise it must be a
    built-in name, and an unknown one raises InputError listing the built-ins.
    """
    text = str(name_or_path)
    if looks_like_path(text):
        return load_target_file(text)
    _check_builtin(text)
    return _load_builtin(text)


def load_targets(names_or_paths: list[str] | tuple[str, ...]) -> list[TargetProfile]:
    """Load several targets; two with the same name are refused (results are keyed by name)."""
    targets = [load_target(item) for item in names_or_paths]
    seen: dict[str, str] = {}
    for target in targets:
        if target.name in seen:
            raise InputError(f"two targets are named '{target.name}' ({seen[target.name]} and "
                             f"{target.source}); give each target file its own name")
        seen[target.name] = target.source
    return targets


def _check_builtin(name: str) -> None:
    names = builtin_target_names()
    if name not in names:
        raise InputError(f"unknown target '{name}'{suggest(name, names)}; built-in targets: "
                         f"{', '.join(names)}; or give the path of a target YAML file")


def _builtin_bytes(name: str) -> bytes:
    return bundled_bytes(_BUILTIN_PACKAGE, _BUILTIN_DIR, name)


@cache
def _load_builtin(name: str) -> TargetProfile:
    shown = f"gate/targets/builtin/{name}.yaml"
    return parse_target_bytes(_builtin_bytes(name), shown, source="builtin")
