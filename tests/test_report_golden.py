"""Every report, rendered from two realistic runs, against its golden file and against each other.

The stored results (``tests/golden/demo_result.json``: the demo's pull request;
``tests/golden/audit_result.json``: a sharded audit of the same repository merged
from two shards) come from real runs of roofgate, not hand-made verdicts;
``tests/golden/regenerate.py`` makes them again (see tests/golden/README.md).

Besides the byte-for-byte comparison, every report must name the same failed
rules and the same worst layer, and lead with what blocks the merge.
"""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from gate.report import html, junit, markdown, sarif, terminal
from gate.report.annotations import render as annotation_lines
from gate.report.jsonout import read_result
from gate.result import FAIL, GateResult
from tests.golden.regenerate import RUNS, render_all
from tests.recordkit import assert_golden

GOLDEN = Path(__file__).parent / "golden"


def _result(name: str) -> GateResult:
    return read_result(str(GOLDEN / f"{name}_result.json"))


@pytest.mark.parametrize("name", RUNS)
def test_reports_match_their_golden_files(name: str) -> None:
    for file_name, text in render_all(name, GOLDEN / f"{name}_result.json").items():
        assert_golden(file_name, text)


def test_the_runs_are_realistic() -> None:
    """The demo fails on the widened layer and improves the wake-word model; the audit was
    merged from shards and judged against a snapshot (a trend, the same failure)."""
    demo, audit = _result("demo"), _result("audit")
    assert demo.command == "check" and audit.command == "audit"
    for result in (demo, audit):
        assert result.exit_code == 1
        assert {b.verdict.rule_id for b in result.blocking} == {"params-fit-buffer"}
        species = next(e for e in result.entries if e.model.endswith("species.onnx"))
        assert species.worst_layer == "stage4.block1.conv2"
    assert len(audit.entries) == 4 and all(e.base is not None for e in audit.entries)


def _failed_rules(result: GateResult) -> set[str]:
    return {v.rule_id for e in result.entries for v in e.verdicts if v.status == FAIL}


def _worst_layers(result: GateResult) -> set[str]:
    return {e.worst_layer for e in result.entries if e.status == FAIL and e.worst_layer}


def _every_report(result) -> dict[str, str]:
    """Each report format's text for ``result``, by format name."""
    return {
        "terminal": terminal.render(result),
        "markdown": markdown.render(result),
        "junit": junit.render(result),
        "sarif": json.dumps(sarif.sarif_log(result)),
        "annotations": "\n".join(annotation_lines(result)),
        "html": html.render(result),
    }


@pytest.mark.parametrize("name", RUNS)
def test_every_report_names_the_same_failed_rules_and_worst_layer(name: str) -> None:
    result = _result(name)
    rules, worst = _failed_rules(result), _worst_layers(result)
    assert rules and worst
    texts = _every_report(result)
    for report, text in texts.items():
        for rule in rules:
            assert rule in text, (report, rule)
        for layer in worst:
            assert layer in text, (report, layer)
    # the JSON summary and the JUnit properties carry the worst layer as a field
    assert f'name="worst_layer" value="{next(iter(worst))}"' in texts["junit"]


@pytest.mark.parametrize("name", RUNS)
def test_every_report_leads_with_what_blocked(name: str) -> None:
    result = _result(name)
    first = result.blocking[0].sentence()
    term = terminal.render(result).splitlines()
    assert term[1].startswith("BLOCKED by") and first in term[2]
    md = markdown.render(result).splitlines()
    body = [line for line in md[1:] if line.strip()]
    assert body[0].startswith("## ") and body[1].startswith("**Blocking")
    assert body[2].startswith("1. ") and "stage4.block1.conv2" in body[2]
    page = html.render(result)
    assert page.index('id="blocking"') < page.index('id="overview"')
    suite = ET.fromstring(junit.render(result)).find("testsuite")
    assert suite is not None
    failure = suite.find("testcase/failure")  # the first case of the first (worst) suite
    assert failure is not None and failure.get("message", "").startswith(first)
    lines = annotation_lines(result)
    assert lines[0].startswith("::error") and "params-fit-buffer" in lines[0]
    results = sarif.sarif_log(result)["runs"][0]["results"]
    assert results[0]["ruleId"] == "params-fit-buffer" and results[0]["level"] == "error"


def test_markdown_fits_the_comment_limit_with_the_blocking_lines_first() -> None:
    for name in RUNS:
        text = markdown.render(_result(name))
        assert markdown.comment_size(text) <= markdown.COMMENT_LIMIT_CHARS
        columns = {len(re.findall(r"(?<!\\)\|", row)) - 1 for row in text.splitlines()
                   if row.startswith("|")}
        assert max(columns) <= 6  # at most six columns at comment width


def test_each_remedy_is_said_once_per_finding_in_the_comment() -> None:
    result = _result("demo")
    text = markdown.render(result)
    for verdict in (v for e in result.entries for v in e.verdicts if v.status == FAIL):
        assert text.count(verdict.remedy) == 1, verdict.rule_id


def test_every_report_names_a_changed_model_outside_every_group() -> None:
    """The demo's result with one changed .onnx no model group covers (rule not-gated): every
    report names the rule and the file, and the formats that lead with what blocked put it
    right after the blocking findings."""
    from dataclasses import replace

    from gate.result import UngatedModel, not_gated_sentence

    item = UngatedModel("models/drone/landing.onnx",
                        "no model group covers it; add a group or list it under ungated:")
    result = replace(_result("demo"), ungated=(item,))
    assert result.exit_code == 1
    texts = _every_report(result)
    for report, text in texts.items():
        assert "not-gated" in text and item.model in text, report
    sentence = not_gated_sentence(item)
    last_blocking = result.blocking[-1].sentence()
    for report in ("terminal", "markdown", "html"):
        text = texts[report]
        lead = text.index(last_blocking.split(" Fix:")[0])
        assert lead < text.index(sentence) < text.index("species.onnx", text.index(sentence)), \
            report
    results = sarif.sarif_log(result)["runs"][0]["results"]
    assert [r["ruleId"] for r in results[:2]] == ["params-fit-buffer", "not-gated"]
