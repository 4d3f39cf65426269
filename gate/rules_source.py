"""Where ``roofgate check`` takes its rules from: the merge base, unless the base opts in.

A pull request must not define its own gate. So ``check`` reads the project
config, the policies (with their waivers), the target files and a committed
baseline as they are at the merge base: every YAML file of that commit (and
the baseline) is written raw (``git cat-file blob``, no filters) into a
temporary folder at its repository path, and the config is loaded from there.
The pull request's versions (read the same way from HEAD) are compared with
them, and each difference is listed in every report under "rules changed in
this pull request" (gate/rules_diff.py); they take effect after merge.

A repository may opt into the pull request's rules with ``rules_from: head``
in the *base's* ``roofgate.yaml``; the reports then say so first. When the
base has no ``roofgate.yaml`` yet (the pull request adds roofgate), the
pull request's rules are used, and the reports say that too. Waivers of the
rules a run uses are checked where every run loads its policies
(gate/gating.PolicyCache, gate/policy/waivers.refuse_weak_waivers).
"""

from __future__ import annotations

import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from gate import gitscan
from gate.bundled import names_a_file
from gate.config import CONFIG_FILE, ProjectConfig, find_config, resolve_file
from gate.errors import RoofgateError
from gate.policy.load import load_policy
from gate.policy.spec import Policy
from gate.result import RulesSource
from gate.rules_diff import config_changes, policy_changes

RULE_SUFFIXES = (".yaml", ".yml")

# load(config file or None for "as the working tree has it", apply command-line flags?)
ConfigLoader = Callable[[Path | None, bool], ProjectConfig]


@dataclass(frozen=True, slots=True)
class CheckRules:
    """The rules one ``check`` run judges with, and what the reports must say about them."""

    config: ProjectConfig
    source: RulesSource | None  # where the rules come from, what changed (None: the operator's)
    repo_files: tuple[str, ...]  # the rule files in the working tree (no report may replace them)
    baseline: str | None  # the snapshot to read: the base's copy when the path is committed
    tree: str = ""  # the temporary folder the rules were read from

    def repo_name(self, path: str) -> str:
        """A rule file read from the temporary folder, named by its repository path."""
        return _tree_rel(Path(self.tree), path) if self.tree else path


@contextmanager
def check_rules(root: Path, base_commit: str, load: ConfigLoader, *, config_path: str | None,
                baseline: str | None) -> Iterator[CheckRules]:
    """The rules of a ``check`` run (see the module docstring), valid for the ``with`` block."""
    config_rel = _config_rel(root, config_path)
    baseline_rel = _repo_rel(root, baseline) if baseline else None
    with tempfile.TemporaryDirectory(prefix=f"roofgate-base-{base_commit[:12]}-") as base, \
            tempfile.TemporaryDirectory(prefix="roofgate-head-") as head, \
            _named_in_repository({f"{base}/": f"{base_commit[:12]}:", f"{head}/": "HEAD:"}):
        trees = {"base": Path(base), "head": Path(head)}
        for rev, folder in ((base_commit, trees["base"]), ("HEAD", trees["head"])):
            export_rule_files(root, rev, folder, baseline_rel)
        if config_rel is None:  # a config outside the repository: the operator's, used as is
            yield CheckRules(load(None, True), None, (), baseline)
            return
        raw = {side: _load_raw(load, folder / config_rel) for side, folder in trees.items()}
        side, statement = _chosen_side(raw["base"], base_commit)
        config = load(trees[side] / config_rel, True) if raw[side] else load(None, True)
        source = RulesSource(side, statement, tuple(_changes(raw, trees, baseline_rel)))
        yield CheckRules(config, source, _repo_files(config, trees[side], root),
                         _baseline(trees[side], baseline_rel, baseline), str(trees[side]))


@contextmanager
def _named_in_repository(prefixes: dict[str, str]) -> Iterator[None]:
    """An error about a rule file read from a temporary folder names it as git does,
    ``REV:path`` (``4f2c9a1b0d3e:policies/gate.yaml:12: ...``), never the temporary path."""
    try:
        yield
    except RoofgateError as exc:
        def named(text: str) -> str:
            for temporary, revision in prefixes.items():
                text = text.replace(temporary, revision)
            return text
        exc.rename_paths(named)
        raise


def export_rule_files(root: Path, rev: str, folder: Path, extra: str | None = None) -> None:
    """Write every tracked YAML file of ``rev`` (and ``extra``, a repository path) into ``folder``."""
    for path in gitscan.tracked_files(root, rev):
        if not (path.endswith(RULE_SUFFIXES) or path == extra) or ".." in Path(path).parts:
            continue
        target = folder / path
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(gitscan.read_raw_blob(rev, path, root))


def _chosen_side(base: ProjectConfig | None, base_commit: str) -> tuple[str, str]:
    if base is None:
        return "head", (f"Rules from this pull request: the merge base {base_commit[:12]} has no "
                        f"{CONFIG_FILE}, so the pull request's own config and policies judge it")
    if base.rules_from == "head":
        return "head", ("Rules from this pull request: the base's roofgate.yaml sets "
                        "'rules_from: head', so the pull request's own config, policies, "
                        "waivers and baseline judge it")
    return "base", (f"Rules from the merge base {base_commit[:12]}: config, policies, waivers "
                    "and baseline as the target branch has them")


def _load_raw(load: ConfigLoader, path: Path) -> ProjectConfig | None:
    """The config file at ``path`` without command-line flags (None when there is none).

    A file that cannot be read is an error on either side: the base's would
    judge this pull request, the head's would judge every later one.
    """
    return load(path, False) if path.is_file() else None


def _changes(raw: dict[str, ProjectConfig | None], trees: dict[str, Path],
             baseline_rel: str | None) -> list[str]:
    base, head = raw["base"], raw["head"]
    lines = config_changes(base, head) if (base or head) else []
    lines += policy_changes(_policies(base, trees["base"]), _policies(head, trees["head"]))
    if baseline_rel and _bytes(trees["base"] / baseline_rel) != _bytes(trees["head"] / baseline_rel):
        lines.append(f"{baseline_rel}: the committed baseline snapshot changed")
    return lines


def _policies(config: ProjectConfig | None, tree: Path) -> dict[str, Policy]:
    """The policies a config names, by repository path (or built-in name)."""
    if config is None:
        return {}
    out: dict[str, Policy] = {}
    for ref in dict.fromkeys(p for g in (*config.groups, config.defaults) for p in g.policies):
        file = resolve_file(config, ref) if names_a_file(ref) else ref
        key = _tree_rel(tree, file) if names_a_file(ref) else ref
        out[key] = load_policy(file)  # a policy that cannot be read stops the run (exit 2)
    return out


def _repo_files(config: ProjectConfig, tree: Path, root: Path) -> tuple[str, ...]:
    """The working-tree paths of the config and policy files the run uses."""
    files = [config.source or ""] + [resolve_file(config, p) for g in config.groups
                                     for p in g.policies if names_a_file(p)]
    return tuple(str(root / _tree_rel(tree, f)) for f in files if f)


def _baseline(tree: Path, baseline_rel: str | None, given: str | None) -> str | None:
    if baseline_rel and (tree / baseline_rel).is_file():
        return str(tree / baseline_rel)
    return given


def _config_rel(root: Path, config_path: str | None) -> str | None:
    found = Path(config_path) if config_path else find_config(Path.cwd())
    if found is None:
        return CONFIG_FILE
    return _repo_rel(root, str(found))


def _repo_rel(root: Path, path: str) -> str | None:
    try:
        return Path(path).resolve().relative_to(root.resolve()).as_posix()
    except ValueError:
        return None


def _tree_rel(tree: Path, file: str) -> str:
    try:
        return Path(file).resolve().relative_to(tree.resolve()).as_posix()
    except ValueError:
        return file


def _bytes(path: Path) -> bytes | None:
    return path.read_bytes() if path.is_file() else None
