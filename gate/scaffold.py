"""``roofgate init``: look at a repository's models and write a starting configuration.

It lists the ``.onnx`` files git knows (tracked, or untracked and not ignored), tells
real models from Git LFS pointers, reads the symbolic input dims each model leaves
unbound, binds the batch-like ones to 1 (or to the ``--dim`` values given), proposes
one model group per folder plus a catch-all group so a model added later is gated
too, and renders ``roofgate.yaml``, a starter policy (a copy of the built-in
``default``) and, on request, the GitHub workflows (the package's copies of
``.github/examples``). Writing never replaces an existing file unless forced, and
then the gate runs once on every model it could read.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path, PurePosixPath

from gate import gitscan
from gate.errors import InputError, RoofgateError
from gate.policy import builtin_policy_yaml
from gate.result import GateResult

CONFIG_FILE = "roofgate.yaml"
POLICY_FILE = "policies/roofgate.yaml"
WORKFLOWS = ("roofgate-pr.yml", "roofgate-pr-comment.yml", "roofgate-nightly.yml")
DEFAULT_TARGET = "ws-64x64-4mib"
# Input dims that mean "how many samples at once": a deployed edge model runs one.
_BATCH_NAMES = frozenset({"batch", "batch_size", "batchsize", "bs", "b", "n", "nbatch"})


@dataclass(frozen=True, slots=True)
class FoundModel:
    """One ``.onnx`` file of the repository, as far as init could read it."""

    path: str  # repository-relative, '/'-separated
    lfs_pointer: bool = False
    dims: tuple[str, ...] = ()  # symbolic dims the model leaves unbound
    problem: str = ""  # why it could not be read (shown; the gate will say it too)


@dataclass(frozen=True, slots=True)
class Plan:
    """What init will write, and what it saw."""

    files: tuple[tuple[str, str], ...]  # (repository-relative path, text), in write order
    models: tuple[FoundModel, ...]
    dims: Mapping[str, int] = field(default_factory=dict)  # bindings written to the config
    unbound: tuple[str, ...] = ()  # dims no value could be picked for


def find_models(root: Path) -> list[FoundModel]:
    """Every ``.onnx`` file git knows in ``root`` (tracked or untracked-not-ignored) that
    is in the working tree (one deleted there but still in the index is gone), read."""
    raw = gitscan.git(["ls-files", "-z", "--cached", "--others", "--exclude-standard", "--",
                       "*.onnx"], root, what="listing the repository's files")
    names = sorted({n.decode("utf-8", "surrogateescape") for n in raw.split(b"\0") if n})
    return [inspect_model(root, name) for name in names if os.path.lexists(root / name)]


def inspect_model(root: Path, name: str) -> FoundModel:
    """Whether ``name`` is an LFS pointer, else the symbolic dims loading it leaves unbound."""
    from gate.model.loader import load_model

    path = root / name
    try:
        with open(path, "rb") as head:
            if gitscan.is_lfs_pointer(head.read(gitscan.LFS_POINTER_MAX_BYTES + 1)):
                return FoundModel(name, lfs_pointer=True)
    except OSError:
        pass  # a link to nothing, unreadable: the loader says which
    try:
        return FoundModel(name, dims=tuple(sorted(load_model(path).unbound_dims)))
    except RoofgateError as exc:
        return FoundModel(name, problem=exc.format_message())


def choose_dims(models: Sequence[FoundModel], given: Mapping[str, int],
                ) -> tuple[dict[str, int], tuple[str, ...]]:
    """Bindings for every dim the models leave unbound: ``given``, else 1 for batch-like names.

    Returns (bindings, dims without a value). A given binding no model uses is kept:
    the user asked for it.
    """
    bound = dict(given)
    unknown = []
    for name in sorted({d for m in models for d in m.dims}):
        if name in bound:
            continue
        if name.lower() in _BATCH_NAMES or name.lower().startswith("batch"):
            bound[name] = 1
        else:
            unknown.append(name)
    return dict(sorted(bound.items())), tuple(unknown)


def make_plan(root: Path, targets: Sequence[str], given_dims: Mapping[str, int],
              workflows: bool) -> Plan:
    """Look at the models under ``root`` and render every file init would write."""
    models = find_models(root)
    dims, unknown = choose_dims(models, given_dims)
    files = [(CONFIG_FILE, render_config(models, targets or [DEFAULT_TARGET], dims, unknown)),
             (POLICY_FILE, starter_policy())]
    if workflows:
        files += [(f".github/workflows/{name}", workflow_template(name)) for name in WORKFLOWS]
    return Plan(tuple(files), tuple(models), dims, unknown)


def render_config(models: Sequence[FoundModel], targets: Sequence[str],
                  dims: Mapping[str, int], unknown: Sequence[str]) -> str:
    """``roofgate.yaml``: top-level targets, policy and dims, one group per model folder."""
    lines = [
        "# roofgate project config, written by `roofgate init` (docs/ci.md explains each key).",
        "# Estimates are analytical, not device measurements.",
        "version: 1",
        f"targets: {_flow(targets)}"
        + ("  # a fictional example target: replace it (`roofgate targets`)"
           if list(targets) == [DEFAULT_TARGET] else ""),
        f"policies: {_flow([POLICY_FILE])}  # a copy of the built-in default: edit its limits",
    ]
    if dims:
        lines.append("dims: {" + ", ".join(f"{_quote(k)}: {v}" for k, v in dims.items()) + "}")
    lines += ["models:  # the first group whose paths match a model wins"]
    for folder, count in _folders(models).items():
        lines.append(f"  - paths: {_flow([_folder_glob(folder)])}  # {count} model(s) now")
        lines += _unknown_dims_comment(models, folder, unknown)
    lines.append(f"  - paths: {_flow(['**/*.onnx'])}  # models added later, anywhere")
    return "\n".join(lines) + "\n"


def starter_policy() -> str:
    """The built-in ``default`` policy, renamed so reports tell the team's copy apart."""
    text = builtin_policy_yaml("default")
    return text.replace("\nname: default\n", "\nname: team\n", 1)


def workflow_template(name: str) -> str:
    """A GitHub workflow of ``.github/examples`` as shipped in the package."""
    return resources.files("gate").joinpath("templates").joinpath("github").joinpath(name).read_text(
        "utf-8")


def write_plan(root: Path, plan: Plan, force: bool) -> list[str]:
    """Write the plan's files under ``root``; refuses (writing nothing) to replace any unless forced."""
    existing = [rel for rel, _ in plan.files if (root / rel).exists()]
    if existing and not force:
        raise InputError(f"{', '.join(existing)} already exist(s); roofgate init does not "
                         "replace files: move them away, or pass --force to overwrite")
    for rel, text in plan.files:
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return [rel for rel, _ in plan.files]


def readable_models(plan: Plan) -> list[str]:
    """The models the first run can analyse (pointers and unreadable files are explained)."""
    return [m.path for m in plan.models if not m.lfs_pointer and not m.problem]


def first_run(root: Path, plan: Plan) -> GateResult | None:
    """The gate once, with the written config, on every model init could read (None: none)."""
    from gate.ci import run_audit
    from gate.config import load_config

    models = readable_models(plan)
    if not models:
        return None
    config = load_config(root / CONFIG_FILE, root=root)
    result, _ = run_audit(root, config, [str(root / m) for m in models], baseline=None,
                          workers=1)
    return result


def explain(plan: Plan, written: Sequence[str], workflows: bool) -> list[str]:
    """What init saw and what to do next, one line each."""
    lines = [f"found {len(plan.models)} ONNX file(s); wrote {', '.join(written)}"]
    for model in plan.models:
        if model.lfs_pointer:
            lines.append(f"  {model.path}: a Git LFS pointer, not the model; fetch it "
                         f"(git lfs pull --include=\"{model.path}\") so its dims can be read, "
                         "then run roofgate init --force again")
        elif model.problem:
            lines.append(f"  {model.path}: could not be read ({model.problem})")
    if plan.unbound:
        bind = " ".join(f"--dim {d}=N" for d in plan.unbound)
        lines.append(f"  no value for the input dim(s) {', '.join(plan.unbound)}: run "
                     f"roofgate init --force {bind} (or set dims: in {CONFIG_FILE})")
    lines.append(f"next: review the files, then git add {' '.join(written)} and commit")
    if workflows:
        lines.append("  in .github/workflows/*.yml replace the PIN placeholder "
                     "(your-org/roofgate@000...) with the roofgate commit you reviewed")
    return lines


def _folders(models: Sequence[FoundModel]) -> dict[str, int]:
    counts: dict[str, int] = {}
    for model in models:
        folder = str(PurePosixPath(model.path).parent)
        counts[folder] = counts.get(folder, 0) + 1
    return dict(sorted(counts.items()))


def _folder_glob(folder: str) -> str:
    """``folder/*.onnx`` with glob characters in the folder name matched literally."""
    literal = "".join(f"[{c}]" if c in "*?[" else c for c in folder)
    return "*.onnx" if folder == "." else f"{literal}/*.onnx"


def _unknown_dims_comment(models: Sequence[FoundModel], folder: str,
                          unknown: Sequence[str]) -> list[str]:
    here = sorted({d for m in models if str(PurePosixPath(m.path).parent) == folder
                   for d in m.dims if d in unknown})
    if not here:
        return []
    return [(f"    # dims: {{{', '.join(f'{d}: N' for d in here)}}}  # unbound in these models: "
            "set N, or their layers stay unmodelled")]


def _flow(items: Sequence[str]) -> str:
    return "[" + ", ".join(_quote(i) for i in items) + "]"


def _quote(text: str) -> str:
    return json.dumps(text, ensure_ascii=False)  # a JSON string is a YAML double-quoted scalar
