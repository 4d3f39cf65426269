"""SARIF 2.1.0 log: valid against the OASIS schema, one result per failed rule, and agreeing
with the JUnit, markdown and HTML reports on which rules failed.

The schema is the OASIS SARIF v2.1.0 (Errata 01) JSON schema, vendored in
tests/schemas/ (its README names the source). URI references are checked with
RFC 3986 rules (no spaces or other characters that must be percent-encoded).
"""

from __future__ import annotations

import copy
import io
import json
import re
import xml.etree.ElementTree as ET
from dataclasses import replace
from pathlib import Path

import click
import jsonschema
import pytest
from click.testing import CliRunner

from gate.report import all_reporters, report_options
from gate.report.sarif import (
    MODEL_ERROR_RULE,
    REPORTER,
    SARIF_SCHEMA_URI,
    artifact_uri,
    sarif_level,
)
from gate.report.text import term_safe
from gate.result import (
    FAIL,
    NOT_GATED,
    PASS,
    WAIVED,
    Entry,
    GateResult,
    ModelError,
    UngatedModel,
    not_gated_sentence,
)
from tests.reportkit import HOSTILE, cnn_layers, demo_result, make_run, make_verdict

SCHEMA_PATH = Path(__file__).parent / "schemas" / "sarif-schema-2.1.0.json"
# RFC 3986 section 2: unreserved, reserved (gen-delims, sub-delims) and percent-encoded bytes.
URI_REFERENCE = re.compile(r"^(?:[A-Za-z0-9\-._~:/?#\[\]@!$&'()*+,;=]|%[0-9A-Fa-f]{2})*$")


@pytest.fixture(scope="module")
def validator() -> jsonschema.protocols.Validator:
    schema = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))
    cls = jsonschema.validators.validator_for(schema)
    cls.check_schema(schema)
    assert cls is jsonschema.Draft4Validator  # the OASIS schema is draft-04
    return cls(schema, format_checker=cls.FORMAT_CHECKER)


def _written(result: GateResult) -> dict:
    stream = io.StringIO()
    REPORTER.write(result, stream)
    return json.loads(stream.getvalue())


def _with_error(result: GateResult) -> GateResult:
    return replace(result, errors=(ModelError("models/broken file.onnx", "not an ONNX file"),))


@pytest.mark.parametrize("result", [
    demo_result(), demo_result(hostile=True), _with_error(demo_result()),
    GateResult("check", (), (), notes=("no models changed",)),
], ids=["demo", "hostile", "model-error", "empty"])
def test_valid_against_the_oasis_schema(validator, result: GateResult) -> None:
    log = _written(result)
    errors = [e.message for e in validator.iter_errors(log)]
    assert errors == []
    assert log["version"] == "2.1.0" and log["$schema"] == SARIF_SCHEMA_URI
    for run in log["runs"]:
        for res in run["results"]:
            for loc in res["locations"]:
                assert URI_REFERENCE.match(loc["physicalLocation"]["artifactLocation"]["uri"])


def test_the_schema_rejects_a_broken_log(validator) -> None:
    """The validator really validates: the same log with a bad level or no version fails."""
    log = _written(demo_result())
    bad_level = copy.deepcopy(log)
    bad_level["runs"][0]["results"][0]["level"] = "fatal"
    no_version = {k: v for k, v in log.items() if k != "version"}
    bad_rule = copy.deepcopy(log)
    bad_rule["runs"][0]["tool"]["driver"]["rules"][0]["defaultConfiguration"]["rank"] = 101
    for broken in (bad_level, no_version, bad_rule):
        assert list(validator.iter_errors(broken))


def test_one_result_per_failed_rule_with_level_location_and_descriptor() -> None:
    result = demo_result()
    run = _written(result)["runs"][0]
    rules = run["tool"]["driver"]["rules"]
    open_results = [r for r in run["results"] if "suppressions" not in r]
    failed = [v for e in result.entries for v in e.verdicts if v.status == FAIL]
    assert len(open_results) == len(failed) == 2
    worst_first = [v for e in result.ranked_entries for v in e.ranked_verdicts if v.status == FAIL]
    for res, verdict in zip(open_results, worst_first):
        assert res["ruleId"] == verdict.rule_id
        assert rules[res["ruleIndex"]]["id"] == verdict.rule_id
        assert res["level"] == sarif_level(verdict.severity)
        uri = res["locations"][0]["physicalLocation"]["artifactLocation"]
        assert uri == {"uri": verdict.model, "uriBaseId": "%SRCROOT%"}
        assert verdict.summary in res["message"]["text"] and verdict.target in res["message"]["text"]
    levels = {r["ruleId"]: r["level"] for r in open_results}
    assert levels == {"params-fit": "error", "min-utilization": "warning"}
    for rule in rules:
        assert rule["shortDescription"]["text"] and rule["fullDescription"]["text"]
        assert rule["help"]["text"].startswith("Remedy: ")
    params_fit = next(r for r in rules if r["id"] == "params-fit")
    assert "quantize its weights" in params_fit["help"]["text"]  # the remedy, named
    assert params_fit["defaultConfiguration"]["level"] == "error"


def test_waived_rule_is_a_suppressed_result_and_passes_are_absent() -> None:
    run = _written(demo_result())["runs"][0]
    waived = [r for r in run["results"] if "suppressions" in r]
    assert [(r["ruleId"], r["locations"][0]["logicalLocations"][0]["name"]) for r in waived] == \
        [("params-fit", "gru")]
    assert waived[0]["suppressions"][0]["status"] == "accepted"
    assert "field trial" in waived[0]["suppressions"][0]["justification"]
    assert len(run["results"]) == 3  # 2 failed + 1 waived; the passing rule is not a result


def test_fingerprints_are_stable_and_distinct() -> None:
    first = [r["partialFingerprints"] for r in _written(demo_result())["runs"][0]["results"]]
    again = [r["partialFingerprints"] for r in _written(demo_result())["runs"][0]["results"]]
    assert first == again and len({json.dumps(f) for f in first}) == len(first)


def test_model_error_is_a_result_and_a_notification() -> None:
    run = _written(_with_error(demo_result()))["runs"][0]
    errors = [r for r in run["results"] if r["ruleId"] == MODEL_ERROR_RULE]
    assert len(errors) == 1 and errors[0]["level"] == "error"
    assert errors[0]["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] == \
        "models/broken%20file.onnx"
    invocation = run["invocations"][0]
    assert invocation["executionSuccessful"] is False and invocation["exitCode"] == 2
    assert "not an ONNX file" in invocation["toolExecutionNotifications"][0]["message"]["text"]


def test_hostile_names_survive_as_plain_data() -> None:
    name = HOSTILE + "\x1b[2J\u2028"
    layers = cnn_layers()
    run_ = make_run("models/odd name#1%.onnx", "t", layers)
    entry = Entry(run_.model, "t", run_, None, None,
                  (make_verdict("params-fit", run_.model, "t", FAIL, layer=name),))
    text = io.StringIO()
    REPORTER.write(GateResult("check", (), (entry,)), text)
    assert text.getvalue().isascii()  # ensure_ascii: no raw control or separator characters
    res = json.loads(text.getvalue())["runs"][0]["results"][0]
    assert res["locations"][0]["logicalLocations"][0]["name"] == term_safe(name)
    assert res["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] == \
        "models/odd%20name%231%25.onnx"
    assert artifact_uri("./models\\a b.onnx") == "models/a%20b.onnx"


def test_registered_and_offered_as_a_command_line_option() -> None:
    assert [r.name for r in all_reporters()].count("sarif") == 1

    @click.command()
    @report_options
    def cmd(**kwargs: object) -> None:
        click.echo(json.dumps({k: v for k, v in kwargs.items() if v}))

    help_text = CliRunner().invoke(cmd, ["--help"]).output
    assert "--sarif PATH" in help_text and "--html PATH" in help_text


# --- the formats agree on which rules failed -------------------------------------

def _sarif_failures(result: GateResult) -> tuple[set, set]:
    run = _written(result)["runs"][0]
    blocking, warnings = set(), set()
    for res in run["results"]:
        if "suppressions" in res or res["ruleId"] == MODEL_ERROR_RULE:
            continue
        key = (res["locations"][0]["physicalLocation"]["artifactLocation"]["uri"],
               res["properties"]["target"], res["ruleId"])
        (blocking if res["level"] == "error" else warnings).add(key)
    return blocking, warnings


def _junit_failures(result: GateResult) -> set:
    junit = pytest.importorskip("gate.report.junit")
    root = ET.fromstring(junit.render(result).encode("utf-8"))
    out = set()
    for suite in root.findall("testsuite"):
        model, target = re.fullmatch(r"(.*) \[(.*)\]", suite.get("name")).groups()
        out |= {(model, target, case.get("name")) for case in suite.findall("testcase")
                if case.find("failure") is not None}
    return out


def _html_failures(result: GateResult) -> tuple[set, set]:
    from gate.report.html import render

    page = render(result)
    blocking, warnings = set(), set()
    for section in re.finditer(r'<section [^>]*data-model="([^"]*)" data-target="([^"]*)">(.*?)'
                               r"</section>", page, re.DOTALL):
        for rule, verdict in re.findall(r'data-rule="([^"]*)" data-verdict="([^"]*)"',
                                        section.group(3)):
            key = (section.group(1), section.group(2), rule)
            if verdict == "fail":
                blocking.add(key)
            elif verdict == "warning":
                warnings.add(key)
    return blocking, warnings


def _expected(result: GateResult) -> tuple[set, set]:
    verdicts = [v for e in result.entries for v in e.verdicts if v.status == FAIL]
    return ({(v.model, v.target, v.rule_id) for v in verdicts if v.severity == "error"},
            {(v.model, v.target, v.rule_id) for v in verdicts if v.severity != "error"})


def _agreement_result() -> GateResult:
    """Two models, two targets, every verdict kind."""
    out = []
    for model in ("models/a.onnx", "models/b.onnx"):
        for target in ("os-16x16-512kib", "ws-64x64-4mib"):
            run_ = make_run(model, target, cnn_layers())
            fail_b = model.endswith("b.onnx") and target.startswith("ws")
            out.append(Entry(model, target, run_, None, None, (
                make_verdict("params-fit", model, target, FAIL if fail_b else PASS, layer="x"),
                make_verdict("min-utilization", model, target,
                             FAIL if target.startswith("os") else WAIVED, severity="warning"),
                make_verdict("max-param-dram", model, target,
                             FAIL if model.endswith("a.onnx") else PASS),
            )))
    return GateResult("audit", ("p.yaml",), tuple(out))


@pytest.mark.parametrize("result", [demo_result(), _agreement_result()], ids=["demo", "grid"])
def test_junit_sarif_and_html_agree_on_failed_rules(result: GateResult) -> None:
    blocking, warnings = _expected(result)
    assert blocking and warnings
    assert _sarif_failures(result) == (blocking, warnings)
    assert _html_failures(result) == (blocking, warnings)
    assert _junit_failures(result) == blocking  # JUnit: warnings do not fail a test case


@pytest.mark.parametrize("result", [demo_result(), _agreement_result()], ids=["demo", "grid"])
def test_markdown_agrees_on_failed_rules(result: GateResult) -> None:
    blocking, warnings = _expected(result)
    assert _markdown_failures(result) == (blocking, warnings)


def _unescape(cell: str) -> str:
    return re.sub(r"\\(.)", r"\1", cell.strip())


def _markdown_failures(result: GateResult) -> tuple[set, set]:
    """(model, target, rule) of the failing rows of each block's rule table in the comment."""
    markdown = pytest.importorskip("gate.report.markdown")
    text = io.StringIO()
    markdown.REPORTER.write(result, text)
    blocking, warnings = set(), set()
    for block in text.getvalue().split("\n### ")[1:]:
        heading, _, body = block.partition("\n")
        model, _, target = heading.partition(" \u00b7 ")[2].rpartition(" on ")
        table = body.partition("| Rule | Outcome |")[2].strip().split("\n\n")[0]
        for row in table.splitlines()[1:]:
            cells = row.strip("|").split("|")
            key = (_unescape(model), target.strip(), _unescape(cells[0]))
            if "blocks merge" in cells[1]:
                blocking.add(key)
            elif "warning" in cells[1]:
                warnings.add(key)
    return blocking, warnings


# --- what blocked leads; models outside every model group; rules applied ------------------

def _with_ungated(result: GateResult) -> GateResult:
    return replace(result, ungated=(
        UngatedModel("models/new dir/extra.onnx", "no model group covers it; add a group or "
                     "list it under ungated: in roofgate.yaml"),
        UngatedModel("models/scratch/tmp.onnx", "matches ungated: models/scratch/**",
                     skipped=True)))


def test_not_gated_models_are_error_results_of_their_own_rule(validator) -> None:
    result = _with_ungated(demo_result())
    log = _written(result)
    assert [e.message for e in validator.iter_errors(log)] == []
    run = log["runs"][0]
    rules = run["tool"]["driver"]["rules"]
    not_gated = [r for r in run["results"] if r["ruleId"] == NOT_GATED]
    assert len(not_gated) == 1  # the skipped file is not a result
    res = not_gated[0]
    assert res["level"] == "error" and rules[res["ruleIndex"]]["id"] == NOT_GATED == "not-gated"
    assert res["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] == \
        "models/new%20dir/extra.onnx"
    assert res["message"]["text"] == not_gated_sentence(result.not_gated[0])
    notes = run["invocations"][0]["toolExecutionNotifications"]
    by_level = {n["level"]: n["message"]["text"] for n in notes}
    assert "extra.onnx" in by_level["error"] and "scratch/tmp.onnx" in by_level["note"]
    assert run["invocations"][0]["executionSuccessful"] is True  # a gate failure, not a crash
    assert run["properties"]["modelCounts"] == {"seen": 4, "gated": 2, "notGated": 1,
                                                "skipped": 1}


def test_results_lead_with_what_blocked_then_not_gated_models() -> None:
    result = _with_ungated(demo_result())
    results = _written(result)["runs"][0]["results"]
    kinds = ["waived" if "suppressions" in r else "not-gated" if r["ruleId"] == NOT_GATED
             else "block" if r["level"] == "error" else "warning" for r in results]
    assert kinds == ["block", "not-gated", "warning", "waived"]
    first = result.blocking[0]
    # the blocking result's message opens with the sentence every report leads with
    assert results[0]["message"]["text"].splitlines()[0] == term_safe(first.sentence())


def test_every_model_target_lists_the_rules_that_applied() -> None:
    result = demo_result()
    listed = _written(result)["runs"][0]["properties"]["modelTargets"]
    assert [(m["model"], m["target"], m["status"], m["rulesApplied"]) for m in listed] == \
        [(e.model, e.target, e.status_word, list(e.rules_applied))
         for e in result.ranked_entries]
    assert any("min-utilization" in m["rulesApplied"] and m["status"] == "fail" for m in listed)
