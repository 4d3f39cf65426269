"""The project configuration file, ``roofgate.yaml``: which models, on which targets, under which policies.

One file at the repository root (or ``--config PATH``) declares everything a
CI run needs, so the command line in a workflow stays ``roofgate check --base
main``. Shape (every key optional except ``models`` entries' ``paths``)::

    version: 1
    targets: [ws-64x64-4mib]            # defaults for every model group
    policies: [policies/default.yaml]
    dims: {batch: 1}
    precision: int8
    exclude: ["models/**/scratch/*.onnx"]
    ungated: ["third_party/**/*.onnx"]   # .onnx files no group gates, on purpose
    models:
      - paths: ["models/trailcam/**/*.onnx"]
        targets: [ws-64x64-4mib, os-16x16-512kib]
      - paths: ["models/handheld/*.onnx"]
        dims: {seq: 128}
      - paths: ["models/camera/*.onnx"]
        shapes: {images: 1x3x640x640}   # every dim of one input (also [1, 3, 640, 640])
    reports: {junit: roofgate-out/junit.xml, markdown: roofgate-out/summary.md,
              json: roofgate-out/result.json}
    rules_from: base                    # check judges with the merge base's rules ("head":
                                        # the pull request's; read from the base's file only)
    waiver_horizon_days: 90             # check refuses waivers expiring later than this

A model belongs to the *first* group whose globs match its repository-relative
path; unset group keys inherit the top-level defaults. Globs use ``/``,
``*`` and ``?`` stay within one folder, ``**`` spans folders. Command-line
flags (``--target``, ``--policy``, ``--dim``, ``--shape``, ``--precision``, report
paths) override the file for every group (``--dim`` and ``--shape`` per name). Without a file, every ``*.onnx`` is a model
and ``--target`` is required.

An ``.onnx`` file that no group covers is *not gated*: ``check`` and ``audit``
fail on it (rule ``not-gated``) unless an ``ungated:`` (or ``exclude:``) glob
names it, so a glob typo cannot switch the gate off in silence.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from yaml.nodes import ScalarNode, SequenceNode

from gate.bundled import names_a_file
from gate.errors import ConfigError
from gate.globs import path_glob_problem, path_match
from gate.model.graph import INT64_MAX
from gate.model.shape_text import StaticShape, parse_shape
from gate.yamlconf import Section, read_yaml_file, scalar_value

CONFIG_FILE = "roofgate.yaml"
CONFIG_VERSION = 1
DEFAULT_MODEL_GLOB = "**/*.onnx"
DEFAULT_REPORTS: Mapping[str, str] = {
    "junit": "roofgate-out/junit.xml",
    "markdown": "roofgate-out/summary.md",
    "json": "roofgate-out/result.json",
}
REPORT_KEYS = ("junit", "markdown", "json", "html", "sarif", "annotations")


@dataclass(frozen=True, slots=True)
class ModelGroup:
    """Models matched by ``paths`` and how to gate them."""

    paths: tuple[str, ...]
    targets: tuple[str, ...]
    policies: tuple[str, ...]
    dims: Mapping[str, int] = field(default_factory=dict)
    precision: str | None = None
    shapes: Mapping[str, StaticShape] = field(default_factory=dict)

    def matches(self, rel_path: str) -> bool:
        return any(glob_match(pattern, rel_path) for pattern in self.paths)

    @property
    def key(self) -> tuple[object, ...]:
        """Groups with equal keys can be judged together."""
        return (self.targets, self.policies, tuple(sorted(self.dims.items())), self.precision,
                tuple(sorted(self.shapes.items())))


@dataclass(frozen=True, slots=True)
class ProjectConfig:
    """The loaded ``roofgate.yaml`` (or the defaults when there is none)."""

    source: str | None  # the file read, None for built-in defaults
    root: str  # folder relative model paths and policy paths are taken from
    groups: tuple[ModelGroup, ...]
    exclude: tuple[str, ...] = ()
    reports: Mapping[str, str] = field(default_factory=dict)
    # The top-level settings: what a model given on the command line that no group
    # covers is analysed with.
    defaults: ModelGroup = ModelGroup((DEFAULT_MODEL_GLOB,), (), ())
    ungated: tuple[str, ...] = ()  # .onnx files no group gates on purpose (not a typo)
    # Whose rules `check` uses: the merge base's ("base", the default) or the pull request's
    # ("head"); only the base's file can choose (gate/rules_source.py).
    rules_from: str = "base"
    waiver_horizon_days: int = 90  # `check` refuses a waiver expiring later than this

    def group_for(self, rel_path: str) -> ModelGroup | None:
        """The first group matching ``rel_path``; None when excluded or unmatched."""
        if any(glob_match(pattern, rel_path) for pattern in self.exclude):
            return None
        for group in self.groups:
            if group.matches(rel_path):
                return group
        return None

    def is_model(self, rel_path: str) -> bool:
        return self.group_for(rel_path) is not None

    def skip_reason(self, rel_path: str) -> str:
        """Why the config leaves ``rel_path`` ungated on purpose ('' when it does not)."""
        for key, patterns in (("exclude", self.exclude), ("ungated", self.ungated)):
            for pattern in patterns:
                if glob_match(pattern, rel_path):
                    return f"listed under '{key}:' ({pattern})"
        return ""

    def globs(self) -> list[tuple[str, str]]:
        """Every path glob of the file as (where, glob): model groups' paths and ungated."""
        out = [(f"models[{k}].paths", p) for k, g in enumerate(self.groups) for p in g.paths]
        return out + [("ungated", p) for p in self.ungated]

    def settings_for(self, file: str | Path) -> ModelGroup:
        """How to analyse ``file`` (a path from the current folder) given by name on the
        command line: its group when one covers it, else the top-level settings."""
        path = Path(file).resolve()
        try:
            rel = path.relative_to(Path(self.root).resolve()).as_posix()
        except ValueError:
            return self.defaults
        group = self.group_for(rel) if not any(
            glob_match(p, rel) for p in self.exclude) else None
        return group or self.defaults


@dataclass(frozen=True, slots=True)
class Overrides:
    """Command-line settings that replace the file's for every group."""

    targets: tuple[str, ...] = ()
    policies: tuple[str, ...] = ()
    dims: Mapping[str, int] = field(default_factory=dict)
    precision: str | None = None
    shapes: Mapping[str, StaticShape] = field(default_factory=dict)


def find_config(start: str | Path = ".") -> Path | None:
    """The ``roofgate.yaml`` in ``start`` or the nearest folder above it.

    The search stops at the first folder holding ``.git`` (the repository
    root), so a file outside the repository is never picked up.
    """
    folder = Path(start).resolve()
    for candidate in (folder, *folder.parents):
        if (candidate / CONFIG_FILE).is_file():
            return candidate / CONFIG_FILE
        if (candidate / ".git").exists():
            return None
    return None


def load_config(path: str | Path | None, *, root: str | Path = ".",
                overrides: Overrides = Overrides(), require_targets: bool = True) -> ProjectConfig:
    """Read ``path`` (or the ``roofgate.yaml`` found from ``root`` upward) and apply ``overrides``.

    Raises ConfigError listing every problem of the file at once, and (unless
    ``require_targets`` is False) when a group has no target.
    """
    root_path = Path(root)
    if path is None:
        path = find_config(root_path)
    if path is None:
        config = ProjectConfig(None, str(root_path), (
            ModelGroup((DEFAULT_MODEL_GLOB,), (), ()),))
    else:
        config = _read(Path(path))
    config = apply_overrides(config, overrides)
    if require_targets:
        _require_targets(config)
    return config


def apply_overrides(config: ProjectConfig, overrides: Overrides) -> ProjectConfig:
    """``config`` with command-line settings replacing (dims, shapes: merging over) each group's."""
    groups = tuple(
        replace(
            group,
            targets=overrides.targets or group.targets,
            policies=overrides.policies or group.policies,
            dims={**group.dims, **overrides.dims},
            precision=overrides.precision or group.precision,
            shapes={**group.shapes, **overrides.shapes},
        )
        for group in (*config.groups, config.defaults)
    )
    return replace(config, groups=groups[:-1], defaults=groups[-1])


def parse_dim_bindings(items: Iterable[str]) -> dict[str, int]:
    """``["batch=1", "seq=128"]`` -> ``{"batch": 1, "seq": 128}`` (ConfigError on a bad item)."""
    out: dict[str, int] = {}
    problems = []
    for item in items:
        name, sep, value = item.partition("=")
        if not sep or not name.strip() or not value.strip().isdigit() or int(value) < 1 \
                or int(value) > INT64_MAX:
            problems.append(f"--dim {item!r}: expected NAME=POSITIVE_INT (at most {INT64_MAX}), "
                            "e.g. batch=1")
            continue
        out[name.strip()] = int(value)
    if problems:
        raise ConfigError(problems)
    return out


# --- reading the file -----------------------------------------------------------

RULES_FROM = ("base", "head")
_TOP_KEYS = ("version", "targets", "policies", "dims", "shapes", "precision", "exclude",
             "ungated", "models", "reports", "rules_from", "waiver_horizon_days")


def _read(path: Path) -> ProjectConfig:
    doc = read_yaml_file(path)
    top = doc.root_mapping()
    version = top.get_int("version", CONFIG_VERSION)
    if version != CONFIG_VERSION:
        top.bad("version", f"version {version} is not supported (this roofgate reads "
                f"version {CONFIG_VERSION}); upgrade roofgate or fix the file")
    defaults = ModelGroup(
        paths=(DEFAULT_MODEL_GLOB,),
        targets=tuple(top.get_str_list("targets", []) or []),
        policies=tuple(top.get_str_list("policies", []) or []),
        dims=_dims(top),
        precision=top.get_str("precision"),
        shapes=_shapes(top),
    )
    exclude = tuple(top.get_str_list("exclude", []) or [])
    ungated = tuple(top.get_str_list("ungated", []) or [])
    groups = tuple(_group(section, defaults) for section in top.get_sections("models"))
    if not top.has("models"):
        groups = (defaults,)
    reports = _reports(top)
    rules_from = top.get_str("rules_from", "base", choices=list(RULES_FROM)) or "base"
    horizon_days = top.get_int("waiver_horizon_days", 90, minimum=1) or 90
    for key, patterns in (("exclude", exclude), ("ungated", ungated),
                          ("models", tuple(p for g in groups for p in g.paths))):
        for pattern in patterns:
            problem = glob_problem(pattern)
            if problem:
                doc.problem(top.node, key, f"glob {pattern!r}: {problem}")
    top.finish()
    doc.raise_if_problems()
    return ProjectConfig(str(path), str(path.parent), groups, exclude, reports, defaults,
                         ungated, rules_from, horizon_days)


def _group(section: Section, defaults: ModelGroup) -> ModelGroup:
    paths = tuple(section.get_str_list("paths", required=True) or [])
    targets = section.get_str_list("targets")
    policies = section.get_str_list("policies")
    dims = _dims(section) if section.has("dims") else None
    shapes = _shapes(section) if section.has("shapes") else None
    precision = section.get_str("precision")
    section.finish()
    return ModelGroup(
        paths=paths,
        targets=tuple(targets) if targets is not None else defaults.targets,
        policies=tuple(policies) if policies is not None else defaults.policies,
        dims={**defaults.dims, **(dims or {})},
        precision=precision if precision is not None else defaults.precision,
        shapes={**defaults.shapes, **(shapes or {})},
    )


def _dims(section: Section) -> dict[str, int]:
    out: dict[str, int] = {}
    for name, sub, node in section.get_mapping_sections("dims"):
        value = scalar_value(node)
        if sub is not None or isinstance(value, bool) or not isinstance(value, int) or value < 1 \
                or value > INT64_MAX:
            section.doc.problem(node, f"{section.key_path + '.' if section.key_path else ''}"
                                f"dims.{name}", f"expected a positive whole number up to {INT64_MAX}")
            continue
        out[name] = value
    return out


def _shapes(section: Section) -> dict[str, StaticShape]:
    """``shapes: {images: 1x3x640x640}`` (or ``[1, 3, 640, 640]``): input name -> every dim."""
    out: dict[str, StaticShape] = {}
    for name, _sub, node in section.get_mapping_sections("shapes"):
        key = f"{section.key_path + '.' if section.key_path else ''}shapes.{name}"
        try:
            out[name] = parse_shape(_shape_text(node))
        except ValueError as exc:
            section.doc.problem(node, key, str(exc))
    return out


def _shape_text(node: Any) -> str:
    """A shape node as ``--shape`` text: a scalar as written, a list of sizes joined by 'x'."""
    if isinstance(node, SequenceNode):
        return "x".join(str(item.value) if isinstance(item, ScalarNode) else "?"
                        for item in node.value)
    return str(node.value) if isinstance(node, ScalarNode) else ""  # as written: 0x3 is no hex


def _reports(top: Section) -> dict[str, str]:
    section = top.get_section("reports")
    if section is None:
        return {}
    out = {}
    for key in REPORT_KEYS:
        value = section.get_str(key)
        if value:
            out[key] = value
    section.finish()
    return out


def _require_targets(config: ProjectConfig) -> None:
    where = config.source or "command line"
    problems = [
        f"{where}: no targets for models matching {', '.join(g.paths)}; "
        "add 'targets:' to the file or pass --target"
        for g in config.groups if not g.targets
    ]
    if problems:
        raise ConfigError(problems)


# --- globs ------------------------------------------------------------------------

def glob_problem(pattern: str) -> str:
    """Why ``pattern`` is not a usable repository-relative glob, or ''."""
    if not pattern:
        return "empty pattern"
    if pattern.startswith("/") or re.match(r"^[A-Za-z]:", pattern):
        return "use a path relative to the repository root"
    if "\\" in pattern:
        return "use '/' between folders"
    if any(part == ".." for part in pattern.split("/")):
        return "'..' is not allowed; paths stay inside the repository"
    return path_glob_problem(pattern)


def glob_match(pattern: str, rel_path: str) -> bool:
    """Whether POSIX ``rel_path`` matches ``pattern`` (``**`` spans folders, ``*`` does not)."""
    return path_match(pattern, rel_path)


def resolve_file(config: ProjectConfig, ref: str) -> str:
    """A policy or target named in the config, as the loaders take it.

    A built-in name (``default``, ``ws-64x64-4mib``: no folder separator, no
    .yaml suffix) is returned unchanged. Relative paths in the file are taken
    from the config file's folder; the result is relative to the current folder
    when it lies inside it (so reports name ``policies/default.yaml``, not an
    absolute path).
    """
    if not names_a_file(ref):
        return ref
    path = Path(ref)
    if not path.is_absolute():
        path = Path(config.root) / path
    absolute = path.resolve()
    try:
        return absolute.relative_to(Path.cwd().resolve()).as_posix()
    except ValueError:
        return str(absolute)


def resolve_target(config: ProjectConfig, ref: str) -> str:
    """A target as ``load_target`` takes it: a built-in name unchanged, a file resolved."""
    return resolve_file(config, ref)
