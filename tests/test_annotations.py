"""GitHub annotations reporter: workflow-command escaping, per-step caps, hostile names.

Escaping rules checked against the GitHub Actions documentation, "Workflow
commands for GitHub Actions" (message: % CR LF -> %25 %0D %0A; properties
additionally : , -> %3A %2C) and the toolkit's @actions/core command.ts
(escapeData / escapeProperty). The 10-errors/10-warnings per step display
limit is from the same documentation ("annotations" limits).
"""

from __future__ import annotations

import io
import re
from dataclasses import replace

from hypothesis import given, settings
from hypothesis import strategies as st

from gate.report.annotations import (
    MAX_PER_KIND,
    REPORTER,
    command,
    escape_data,
    escape_property,
    render,
)
from gate.result import FAIL, ModelError
from tests.recordkit import HOSTILE_NAME, demo_result, entry, finding, result, run, verdict


def unescape(text: str, prop: bool) -> str:
    """Inverse of the toolkit's escaping (the runner decodes in this order)."""
    if prop:
        text = text.replace("%2C", ",").replace("%3A", ":")
    return text.replace("%0A", "\n").replace("%0D", "\r").replace("%25", "%")


def test_escaping_matches_the_workflow_command_rules() -> None:
    assert escape_data("100% done\r\nnext") == "100%25 done%0D%0Anext"
    assert escape_property("a:b,c%\n") == "a%3Ab%2Cc%25%0A"
    assert escape_data("a:b,c") == "a:b,c"  # ':' and ',' are fine in the message


@settings(max_examples=200, deadline=None)
@given(st.text())
def test_escaping_round_trips_and_never_breaks_the_line(text: str) -> None:
    assert unescape(escape_data(text), prop=False) == text
    assert unescape(escape_property(text), prop=True) == text
    line = command("error", text, file=text, title=text)
    assert "\n" not in line and "\r" not in line
    assert line.count("::") >= 2 and line.startswith("::error file=")


def test_one_error_per_failing_rule_and_model_error_none_for_passes() -> None:
    lines = render(demo_result())
    errors = [ln for ln in lines if ln.startswith("::error ")]
    # demo_result: one failing error rule (species) and one unanalysable model
    assert len(errors) == 2 and not [ln for ln in lines if ln.startswith("::warning")]
    species = next(ln for ln in errors if "species.onnx" in ln)
    assert "file=models/trailcam/species.onnx" in species
    assert "title=roofgate fits-param-buffer (ws-64x64-4mib)" in species
    assert "head/gemm" in species and "%0AFix: split the layer" in species
    broken = next(ln for ln in errors if "broken" in ln)
    assert "file=models/broken<b>|.onnx" in broken and "truncated" in broken


def test_hostile_names_cannot_forge_commands() -> None:
    hostile = finding(HOSTILE_NAME, message=HOSTILE_NAME + "\n::warning::x %0A")
    res = result(entry(run(model="m,o:d\nel.onnx"), verdicts=(verdict(
        status=FAIL, model="m,o:d\nel.onnx", findings=(hostile,)),)))
    out = io.StringIO()
    REPORTER.write(res, out)
    lines = out.getvalue().splitlines()
    assert len(lines) == 1  # every newline escaped: no second command
    assert lines[0].startswith("::error file=m%2Co%3Ad%0Ael.onnx,title=")
    assert "\x1b" not in lines[0] and "\\x1b" in lines[0]  # escape sequence made visible
    assert "%250A" in lines[0]  # a literal '%0A' in a name stays literal


def test_more_than_ten_errors_are_summarised() -> None:
    entries = [entry(run(model=f"models/m{k:02d}.onnx"), verdicts=(
        verdict(status=FAIL, model=f"models/m{k:02d}.onnx", findings=(finding(),)),
        verdict("slow", severity="warning", status=FAIL, model=f"models/m{k:02d}.onnx",
                findings=(finding(metric="latency_s"),)))) for k in range(14)]
    lines = render(result(*entries, errors=(ModelError("models/zz.onnx", "bad"),)))
    errors = [ln for ln in lines if ln.startswith("::error")]
    warnings = [ln for ln in lines if ln.startswith("::warning")]
    assert len(errors) == MAX_PER_KIND and len(warnings) == MAX_PER_KIND
    assert re.search(r"::6 more roofgate errors not shown", errors[-1])  # 15 - 9 shown
    assert "models/zz.onnx" in errors[0]  # unanalysable models come first
    assert "5 more roofgate warnings" in warnings[-1]
    assert lines.index(errors[-1]) < lines.index(warnings[0])  # errors before warnings


def test_waived_and_passing_rules_are_silent() -> None:
    waived = verdict(status="waived", findings=(replace(finding(), status="waived"),))
    assert render(result(entry(run(), verdicts=(waived, verdict())))) == []
