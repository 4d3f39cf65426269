"""The terminal summary (gate.report.terminal) that gate, check, audit, merge and demo print.

Hand-made results from tests/recordkit.py; the figures are worked out by hand
from the records there (sizes in binary units: 1 MiB = 1,048,576 bytes, the
IEC 80000-13 convention).
"""

from __future__ import annotations

from dataclasses import replace

from gate.report import terminal
from gate.result import FAIL
from tests.recordkit import demo_result, entry, finding, result, run, verdict

REMEDY = "split the layer or quantize its weights"


def _lines(text: str) -> list[str]:
    return text.splitlines()


def test_title_replaces_the_default_first_line() -> None:
    text = terminal.render(result(), (), "roofgate check: 0 model(s) changed since main")
    assert _lines(text)[0] == "roofgate check: 0 model(s) changed since main"
    assert _lines(terminal.render(result()))[0].startswith("roofgate evaluate: 0 model x target")


def test_remedy_is_shown_once_per_rule_not_per_finding() -> None:
    findings = tuple(finding(f"conv{k}", message=f"Layer 'conv{k}' (Conv): parameters {k} MiB "
                                                 f"exceed the 4.00 MiB parameter buffer: {REMEDY}.")
                     for k in range(5, 10))
    text = terminal.render(result(entry(run(), verdicts=(
        verdict(status=FAIL, findings=findings, remedy=REMEDY),))))
    assert text.count(REMEDY) == 1  # said with the first blocking finding only
    lines = _lines(text)
    assert lines[1] == "BLOCKED by 1 rule:"
    assert lines[2].startswith("  1. models/trailcam/species.onnx on ws-64x64-4mib: rule ")
    assert lines[2].endswith(f"Fix: {REMEDY}.")
    # three findings as sentences, the rest named in one line
    assert lines[5].endswith("also fails at 2 more places: conv8, conv9.")
    # a warning rule says its remedy once too, after its findings
    warn = terminal.render(result(entry(run(), verdicts=(
        verdict(status=FAIL, severity="warning", findings=findings, remedy=REMEDY),))))
    assert warn.count(REMEDY) == 1 and f"             fix: {REMEDY}" in _lines(warn)
    assert "             ... and 2 more" in _lines(warn)


def test_a_message_without_the_remedy_is_left_whole() -> None:
    text = terminal.render(result(entry(run(), verdicts=(
        verdict(status=FAIL, severity="warning",
                findings=(finding(message="odd wording; no remedy here"),)),))))
    assert "odd wording; no remedy here" in text


def test_a_single_model_finding_replaces_the_summary() -> None:
    model_level = finding(None, metric="latency_s", message="Model: latency_s regressed by "
                          "+10% (worst allowed 1.1 ms): check the change.")
    rule = verdict("latency-regression", status=FAIL, severity="warning",
                   findings=(model_level,), remedy="check the change")
    rule = replace(rule, summary="latency_s regressed by +10%")
    text = terminal.render(result(entry(run(), verdicts=(rule,))))
    assert ("           warning latency-regression: latency_s regressed by +10% "
            "(worst allowed 1.1 ms).") in _lines(text)
    assert text.count("regressed by") == 1


def test_improvement_is_named() -> None:
    lines = _lines(terminal.render(demo_result()))
    wake = next(line for line in lines if "wakeword.onnx on" in line)
    assert wake.endswith(", improved")  # latency 2 ms -> 1.2 ms, params 300,000 -> 170,000 B
    species = next(line for line in lines if "species.onnx on" in line)
    assert "improved" not in species  # its parameters grew
    same = _lines(terminal.render(result(entry(run(), run()))))
    assert same[1].endswith("energy 300 nJ, unchanged")  # 3 layers x 1e-7 J each


def test_partial_and_zero_coverage_are_visible() -> None:
    partial = terminal.render(result(entry(run(coverage_work_share=0.75))))
    assert "only 75.0% of the work modelled (figures too low)" in partial
    nothing = terminal.render(result(entry(run(coverage_work_share=0.0, unmodelled_nodes=3,
                                               coverage_node_share=0.0))))
    assert "not costed: no layer could be modelled" in nothing
    assert "latency 0 ms" not in nothing  # never a silent zero
    assert "coverage: 3 of 3 layers unmodelled: none of the work could be costed" in nothing


def test_deleted_model_line() -> None:
    text = terminal.render(result(entry(None, run())))
    assert "  REMOVED  models/trailcam/species.onnx on ws-64x64-4mib  (no longer present" in text


def test_reports_in_one_folder_are_listed_once() -> None:
    assert terminal.reports_line(["out/junit.xml", "out/summary.md"]) == \
        "reports in out/: junit.xml, summary.md"
    assert terminal.reports_line(["junit.xml", "out/summary.md"]) == \
        "reports: junit.xml, out/summary.md"
    assert terminal.reports_line(["a.xml", "b.md"]) == "reports: a.xml, b.md"


def test_worst_findings_come_first() -> None:
    # min-utilization: lower is worse (utilization is better higher, gate.policy.spec)
    lows = tuple(finding(f"conv{k}", metric="utilization", value=v, limit=0.3,
                         message=f"conv{k} at {v:.0%}")
                 for k, v in enumerate((0.25, 0.20, 0.29, 0.05, 0.10)))
    text = terminal.render(result(entry(run(), verdicts=(
        verdict("min-util", status=FAIL, severity="warning", findings=lows),))))
    shown = [line.strip()[2:] for line in _lines(text) if line.startswith("             - ")]
    assert shown == ["conv3 at 5%", "conv4 at 10%", "conv1 at 20%"]
    # parameter bytes: higher is worse
    highs = tuple(finding(f"fc{k}", value=v, limit=100, message=f"fc{k} {v}")
                  for k, v in enumerate((150, 900, 120)))
    text = terminal.render(result(entry(run(), verdicts=(
        verdict(status=FAIL, severity="warning", findings=highs),))))
    shown = [line.strip()[2:] for line in _lines(text) if line.startswith("             - ")]
    assert shown == ["fc1 900", "fc0 150", "fc2 120"]
