"""Loading policy files: the bundled ones, every validation problem at once, globs."""

from __future__ import annotations

import textwrap
from datetime import date
from fnmatch import fnmatchcase
from pathlib import Path, PurePosixPath

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gate.errors import ConfigError
from gate.policy import load_policies, load_policy
from gate.policy.globs import match_any, match_model
from gate.policy.spec import KINDS, LAYER, MODEL

POLICY_DIR = Path(__file__).resolve().parent.parent / "gate" / "policies"


def _write(tmp_path: Path, text: str, name: str = "p.yaml") -> Path:
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def _problems(tmp_path: Path, text: str) -> list[str]:
    path = _write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_policy(path)
    prefix = f"{path}:"
    assert all(p.startswith(prefix) for p in info.value.problems), info.value.problems
    return [p[len(str(path)):] for p in info.value.problems]


# --- the bundled policies ------------------------------------------------------------

@pytest.mark.parametrize("name", ["default", "strict", "nightly"])
def test_bundled_policies_load(name: str) -> None:
    policy = load_policy(POLICY_DIR / f"{name}.yaml")
    assert policy.name == name
    assert policy.rules and not policy.allow_unanalysable
    # Every bundled policy guards against models it cannot see, at error severity.
    assert any(r.kind == "max_unmodelled" and r.severity == "error" for r in policy.rules)


def test_bundled_policies_together_cover_every_rule_kind_and_have_unique_ids() -> None:
    policies = load_policies(sorted(POLICY_DIR.glob("*.yaml")))
    assert {r.kind for p in policies for r in p.rules} == set(KINDS)


def test_bundled_policies_are_commented_for_copying() -> None:
    for path in POLICY_DIR.glob("*.yaml"):
        text = path.read_text(encoding="utf-8")
        assert text.startswith("# roofgate policy:"), path
        assert "docs/policies.md" in text, path


# --- values land in base units -------------------------------------------------------

def test_thresholds_are_read_into_base_units(tmp_path: Path) -> None:
    policy = load_policy(_write(tmp_path, """
        name: units
        targets: ["ws-*"]
        allow_unanalysable: true
        rules:
          - {id: u, kind: min_utilization, level: layer, min: 30%, min_layer_macs: 2M,
             op_types: [Conv], layers: ["/backbone/*"], exclude_layers: ["*dw*"]}
          - {id: d, kind: max_param_dram, max: 1.5 MiB, severity: warning}
          - {id: t, kind: max_latency, max: 800 us, models: ["models/**"]}
          - {id: e, kind: max_energy, max: 2 mJ}
          - {id: r, kind: max_regression, metric: utilization, max_decrease_abs: 5%}
          - {id: r2, kind: max_regression, level: layer, metric: latency_s, max_increase_pct: 10,
             max_increase_abs: 20 us}
          - {id: c, kind: max_unmodelled, max_work_share: 0.05}
          - {id: m, kind: metric_limit, metric: act_dram_bytes, min: 0, max: 4 MiB}
          - {id: f, kind: fits_in_buffer, check: params}
        waivers:
          - {rule: u, models: ["models/a.onnx"], layers: [conv5], reason: tracked,
             expires: 2027-01-31}
    """))
    rules = {r.id: r for r in policy.rules}
    assert policy.targets == ("ws-*",) and policy.allow_unanalysable
    util = rules["u"]
    assert (util.minimum, util.min_layer_macs, util.level) == (0.3, 2_000_000, LAYER)
    assert rules["u"].scope.op_types == ("Conv",) and rules["u"].scope.exclude_layers == ("*dw*",)
    assert rules["d"].maximum == 1.5 * 2**20 and rules["d"].severity == "warning"
    assert rules["t"].maximum == pytest.approx(800e-6) and rules["t"].scope.models == ("models/**",)
    assert rules["e"].maximum == pytest.approx(2e-3)
    assert (rules["r"].metric, rules["r"].max_change_abs, rules["r"].max_change_pct) == (
        "utilization", 0.05, None)
    assert rules["r2"].max_change_abs == pytest.approx(20e-6) and rules["r2"].max_change_pct == 10
    assert rules["c"].max_work_share == 0.05 and rules["c"].max_node_share is None
    assert (rules["m"].minimum, rules["m"].maximum) == (0.0, 4 * 2**20)
    assert (rules["f"].check_params, rules["f"].check_activations, rules["f"].level) == (
        True, False, LAYER)
    assert rules["e"].level == MODEL
    (waiver,) = policy.waivers
    assert (waiver.rule_id, waiver.expires) == ("u", date(2027, 1, 31))
    assert waiver.scope.layers == ("conv5",)


# --- validation: every problem, with line, key path and a suggestion -----------------

BAD_POLICIES = [
    ("typo in a rule key", """
        rules:
          - id: a
            kind: max_latency
            max: 5 ms
            severty: warning
     """, [":6: rules[0].severty: unknown key (did you mean 'severity'?)"]),
    ("typo in the kind", """
        rules:
          - {id: a, kind: max_latncy, max: 5 ms}
     """, [(":3: rules[0].kind: 'max_latncy' is not one of min_utilization, max_param_dram, "
           "fits_in_buffer, max_latency, max_energy, max_regression, max_unmodelled, metric_limit "
           "(did you mean 'max_latency'?)")]),
    ("key of another kind", """
        rules:
          - {id: a, kind: fits_in_buffer, max: 1 MiB}
     """, [":3: rules[0].max: unknown key"]),
    ("duplicate rule id", """
        rules:
          - {id: a, kind: max_latency, max: 5 ms}
          - {id: b, kind: max_energy, max: 1 mJ}
          - {id: a, kind: max_energy, max: 2 mJ}
     """, [":5: rules[2].id: duplicate rule id 'a' (first defined at line 3)"]),
    ("missing threshold and bad severity", """
        rules:
          - {id: a, kind: max_latency, severity: fatal}
     """, [":3: rules[0].severity: 'fatal' is not one of error, warning",
           ":3: rules[0].max: required key is missing"]),
    ("wrong units", """
        rules:
          - {id: a, kind: max_latency, max: 5 MiB}
          - {id: b, kind: min_utilization, min: 130%}
          - {id: c, kind: max_param_dram, max: lots}
     """, [":3: rules[0].max: expected a quantity in s (e.g. '2 Ms'), got '5 MiB'",
           ":4: rules[1].min: must be at most 1",
           ":5: rules[2].max: expected a quantity in B (e.g. '2 MB'), got 'lots'"]),
    ("unknown metric with suggestion", """
        rules:
          - {id: a, kind: max_regression, metric: latency, max_increase_pct: 5}
     """, [(":3: rules[0].metric: unknown model metric 'latency' (did you mean 'latency_s'?); "
           "docs/policies.md lists the metrics")]),
    ("layer metric at model level", """
        rules:
          - {id: a, kind: metric_limit, metric: bound, max: 1}
          - {id: b, kind: metric_limit, metric: input_bytes, max: 1 MiB}
     """, [":3: rules[0].metric: unknown model metric 'bound'; docs/policies.md lists the metrics",
           (":4: rules[1].metric: unknown model metric 'input_bytes' (it is a layer metric: set "
           "level); docs/policies.md lists the metrics")]),
    ("regression in the wrong direction", """
        rules:
          - {id: a, kind: max_regression, metric: utilization, max_increase_pct: 5}
          - {id: b, kind: max_regression, metric: latency_s, max_decrease_pct: 5}
     """, [(":3: rules[0].max_increase_pct: 'utilization' is better higher, so its regression is a "
           "decrease: use 'max_decrease_pct'"),
           (":3: rules[0].metric: give 'max_decrease_pct' and/or 'max_decrease_abs' for "
           "'utilization'"),
           (":4: rules[1].max_decrease_pct: 'latency_s' is better lower, so its regression is "
           "an increase: use 'max_increase_pct'"),
           (":4: rules[1].metric: give 'max_increase_pct' and/or 'max_increase_abs' for "
           "'latency_s'")]),
    ("layer keys on a model rule", """
        rules:
          - {id: a, kind: max_latency, max: 5 ms, layers: [conv1], min_layer_macs: 1}
          - {id: b, kind: min_utilization, min: 0.3, min_layer_macs: 1M}
     """, [":3: rules[0].layers: 'layers' applies only to rules with level: layer",
           ":3: rules[0].min_layer_macs: unknown key (did you mean 'layers'?)",
           (":4: rules[1].min_layer_macs: 'min_layer_macs' applies only to rules with level: "
           "layer")]),
    ("fixed levels", """
        rules:
          - {id: a, kind: fits_in_buffer, level: model}
          - {id: b, kind: max_unmodelled, level: layer, max_node_share: 0}
          - {id: c, kind: max_unmodelled}
     """, [":3: rules[0].level: fits_in_buffer rules are checked at level 'layer' only",
           ":4: rules[1].level: max_unmodelled rules are checked at level 'model' only",
           ":5: rules[2].kind: give 'max_work_share' and/or 'max_node_share' (e.g. '0%')"]),
    ("bad rule ids and patterns", """
        rules:
          - {id: "has space", kind: max_latency, max: 5 ms}
          - {id: b, kind: max_latency, max: 5 ms, models: ["models/[ab.onnx"]}
     """, [":3: rules[0].id: rule id 'has space' may hold only letters, digits, '-', '_' and '.'",
           ":4: rules[1].models: pattern 'models/[ab.onnx' has an unbalanced '['"]),
    ("no rules", """
        name: empty
        rules: []
     """, [":3: rules: a policy needs at least one rule"]),
    ("rules missing, top-level typo, version", """
        version: 2
        nmae: x
     """, [":2: version: policy format version 2 is not supported; this roofgate reads version 1",
           ":2: rules: required key is missing",
           ":3: nmae: unknown key (did you mean 'name'?)"]),
    ("waiver problems", """
        rules:
          - {id: util, kind: min_utilization, level: layer, min: 0.3}
          - {id: lat, kind: max_latency, max: 5 ms}
        waivers:
          - {rule: utl, models: ["**"], reason: x, expires: 2027-01-01}
          - {rule: util, reason: "  ", expires: soon}
          - {rule: lat, models: ["**"], layers: [conv1], reason: x, expires: 2027-01-01}
          - {rule: lat, models: ["**"], expires: 2027-01-01, owner: me}
     """, [":6: waivers[0].rule: no rule with id 'utl' in this policy (did you mean 'util'?)",
           (":7: waivers[1].models: required key is missing (use '**' to waive the rule for every "
           "model)"),
           ":7: waivers[1].expires: expected a date like 2027-01-31, got 'soon'",
           (":7: waivers[1].reason: a waiver needs a reason (why the rule may fail, and who "
           "decided)"),
           (":8: waivers[2].layers: rule 'lat' checks the whole model; its waivers cannot name "
           "layers"),
           ":9: waivers[3].reason: required key is missing",
           ":9: waivers[3].owner: unknown key"]),
    ("wrong shapes", """
        rules:
          id: a
        waivers: nope
        allow_unanalysable: sometimes
     """, [":3: rules: expected a list", ":4: waivers: expected a list",
           ":5: allow_unanalysable: expected true or false"]),
]


@pytest.mark.parametrize(("label", "text", "expected"), BAD_POLICIES,
                         ids=[b[0] for b in BAD_POLICIES])
def test_problems_are_reported_together_with_line_and_key(tmp_path: Path, label: str, text: str,
                                                          expected: list[str]) -> None:
    assert sorted(_problems(tmp_path, text)) == sorted(expected)


def test_rule_ids_clashing_across_files_are_reported(tmp_path: Path) -> None:
    one = _write(tmp_path, "rules:\n  - {id: a, kind: max_latency, max: 5 ms}\n", "one.yaml")
    two = _write(tmp_path, "rules:\n  - {id: b, kind: max_energy, max: 1 mJ}\n"
                           "  - {id: a, kind: max_energy, max: 1 mJ}\n", "two.yaml")
    with pytest.raises(ConfigError) as info:
        load_policies([one, two])
    assert info.value.problems == [
        f"{two}:3: rule id 'a' is also defined in {one}:2; rename one (ids must be unique per run)"]


def test_problems_of_several_files_are_reported_together(tmp_path: Path) -> None:
    one = _write(tmp_path, "rules:\n  - {id: a, kind: max_latency, max: fast}\n", "one.yaml")
    two = _write(tmp_path, "rules: [\n", "two.yaml")
    with pytest.raises(ConfigError) as info:
        load_policies([one, two, tmp_path / "three.yaml"])
    files = [p.split(":")[0] for p in info.value.problems]
    assert files == [str(one), str(two), str(tmp_path / "three.yaml")]


def test_alias_bomb_in_a_policy_is_refused(tmp_path: Path) -> None:
    lines = ["a0: &a0 [{id: x, kind: max_latency, max: 5 ms}]"]
    lines += [f"a{i}: &a{i} [{', '.join([f'*a{i - 1}'] * 10)}]" for i in range(1, 9)]
    lines.append("rules: *a8")
    with pytest.raises(ConfigError):
        load_policy(_write(tmp_path, "\n".join(lines) + "\n"))


# --- globs -----------------------------------------------------------------------------

@pytest.mark.parametrize(("pattern", "path", "expected"), [
    ("**", "models/trailcam/species.onnx", True),
    ("models/**", "models/trailcam/species.onnx", True),
    ("models/**/*.onnx", "models/species.onnx", True),  # ** spans zero folders too
    ("models/**/*.onnx", "models/a/b/c.onnx", True),
    ("models/*.onnx", "models/trailcam/species.onnx", False),  # * stays in one folder
    ("models/trailcam/*", "models/trailcam/species.onnx", True),
    ("*.onnx", "models/trailcam/species.onnx", False),  # whole-path match, not a suffix
    ("**/species.onnx", "species.onnx", True),
    ("**/species.onnx", "models/trailcam/species.onnx", True),
    ("models/handheld/wake?ord.onnx", "models/handheld/wakeword.onnx", True),
    ("models/[ht]*/*.onnx", "models/handheld/wakeword.onnx", True),
    ("models/[!ht]*/*.onnx", "models/handheld/wakeword.onnx", False),
    ("models/trailcam/species.onnx", "./models/trailcam/species.onnx", True),
    ("models/trailcam/species.onnx", "models\\trailcam\\species.onnx", True),
    ("models/trailcam/species.onnx", "models/trailcam/species.onnx.bak", False),
    ("Models/**", "models/x.onnx", False),  # case-sensitive, as git paths are
])
def test_model_globs(pattern: str, path: str, expected: bool) -> None:
    assert match_model(pattern, path) is expected


@pytest.mark.parametrize(("patterns", "name", "expected"), [
    (["*"], "/backbone/conv1/Conv", True),  # layer patterns: * crosses slashes
    (["/backbone/*"], "/backbone/stage2/conv1/Conv", True),
    (["*dw*"], "block3_dw_conv", True),
    (["conv?"], "conv12", False),
    (["Conv", "Gemm"], "Gemm", True),
    (["conv"], "Conv", False),
])
def test_name_patterns(patterns: list[str], name: str, expected: bool) -> None:
    assert match_any(patterns, name) is expected


# '.' and '..' parts are left out: pathlib collapses them, model paths never hold them.
_segment = st.text(alphabet="abc.*?", min_size=1, max_size=4).filter(lambda s: s not in (".", ".."))
_name = st.text(alphabet="abc.", min_size=1, max_size=5).filter(lambda s: s not in (".", ".."))


@settings(max_examples=150, deadline=None)
@given(st.lists(_segment, min_size=1, max_size=3), st.lists(_name, min_size=1, max_size=3))
def test_model_globs_agree_with_the_standard_library(pattern_parts: list[str],
                                                     path_parts: list[str]) -> None:
    """Without '**', a glob matches like pathlib's PurePosixPath.match when both have the same
    number of parts (pathlib matches relative patterns from the right), and each part like
    fnmatch (Python standard library documentation)."""
    pattern, path = "/".join(pattern_parts), "/".join(path_parts)
    if "**" in pattern:
        return
    ours = match_model(pattern, path)
    if len(pattern_parts) == len(path_parts):
        assert ours == PurePosixPath(path).match(pattern)
        assert ours == all(fnmatchcase(n, p) for n, p in zip(path_parts, pattern_parts))
    else:
        assert ours is False


def test_the_full_example_in_the_docs_loads(tmp_path: Path) -> None:
    docs = (POLICY_DIR.parent.parent / "docs" / "policies.md").read_text(encoding="utf-8")
    blocks = docs.split("```yaml\n")[1:]
    example = next(b.split("```")[0] for b in blocks if b.startswith("# policies/team.yaml"))
    policy = load_policy(_write(tmp_path, example))
    assert len(policy.rules) == 9 and len(policy.waivers) == 1
    # Every rule kind and every top-level key the docs table names is known to the loader.
    for kind in KINDS:
        assert f"#### `{kind}`" in docs or f"and `{kind}`" in docs, kind
