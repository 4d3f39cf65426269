"""Markdown pull-request comment: golden file, escaping of hostile names, the size limit.

Escaping checked against the GitHub Flavored Markdown spec (tables split cells
on unescaped ``|``, section 4.10; backslash escapes, section 6.1; raw HTML,
section 6.6) and the 65,536-character comment limit of common code hosts
(documented limit of the GitHub REST API for issue comments; from memory).
"""

from __future__ import annotations

import re

from hypothesis import given, settings
from hypothesis import strategies as st

from gate.report.markdown import COMMENT_LIMIT_CHARS, MARKER, comment_size, render
from gate.result import FAIL, GateResult, ModelError
from tests.recordkit import (
    HOSTILE_NAME,
    demo_result,
    entry,
    finding,
    layer,
    result,
    run,
    verdict,
)

_UNESCAPED_PIPE = re.compile(r"(?<!\\)\|")


def _table_rows(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.startswith("|")]


def test_marker_verdict_and_red_line_for_unanalysable_model() -> None:
    text = render(demo_result())
    lines = text.splitlines()
    assert lines[0] == MARKER
    assert lines[2].startswith("## ") and lines[2].endswith("incomplete: a model could not "
                                                           "be analysed")
    assert any("could not analyse" in line and "models/broken&lt;b&gt;\\|.onnx" in line
               for line in lines)


def test_hostile_names_cannot_break_tables_html_or_mention() -> None:
    text = render(demo_result())
    for row in _table_rows(text):
        header_cells = len(_UNESCAPED_PIPE.findall(row))
        assert header_cells in (7, 6), row  # every row keeps its table's column count
    assert "<img" not in text and "@all" not in text
    assert text.count("<details>") == text.count("</details>") <= 1
    for raw in ("\r", "\x00", "\x1b", "\x85"):
        assert raw not in text
    assert "\\\\r\\\\n\\# head" not in text  # "# head" cannot start a heading line
    assert all(not line.startswith("# head") for line in text.splitlines())


def test_same_column_count_in_every_row_of_each_table() -> None:
    text = render(demo_result())
    blocks = re.split(r"\n(?!\|)", text)
    for block in blocks:
        rows = [r for r in block.splitlines() if r.startswith("|")]
        counts = {len(_UNESCAPED_PIPE.findall(r)) for r in rows}
        assert len(counts) <= 1, block


def test_warnings_only_pass_with_a_warning_mark() -> None:
    warn = verdict("min-util", status=FAIL, severity="warning",
                   findings=(finding(metric="utilization", value=0.1, limit=0.3),))
    text = render(result(entry(run(), run(), (warn,))))
    assert "roofgate evaluate: clear to merge" in text and "1 warning" in text
    assert "**Warnings** (do not block): min-util on models/trailcam/species.onnx" in text
    assert "| min-util | warning | head/gemm | PE utilization 10.0% | 30.0% |" in text
    assert "**Blocking" not in text


def test_no_models_changed_renders_clearly() -> None:
    text = render(result(notes=("no models changed between main and HEAD",)))
    assert "roofgate evaluate: nothing to check" in text
    assert "> no models changed between main and HEAD" in text
    assert "| Status |" not in text


def test_unanalysable_model_is_red_even_when_allowed() -> None:
    res = result(entry(run(), run()), errors=(ModelError("models/x.onnx", "truncated"),))
    allowed = GateResult(res.command, res.policies, res.entries, res.errors, res.notes, True)
    text = render(allowed)
    assert "- **could not analyse** models/x.onnx (let through by the policy)" in text


def _big_result(models: int = 120, layers: int = 60, findings: int = 25) -> GateResult:
    entries = []
    for m in range(models):
        base_layers = tuple(layer(f"block{i}/conv_{'x' * 40}", macs=1000) for i in range(layers))
        head_layers = tuple(layer(f"block{i}/conv_{'x' * 40}", macs=1000 + i, latency_s=2e-5)
                            for i in range(layers))
        failing = m % 3 == 0
        verdicts = (verdict("max-param", model=f"models/m{m:03d}.onnx",
                            status=FAIL if failing else "pass",
                            findings=tuple(finding(f"block{i}/conv") for i in range(findings))
                            if failing else ()),)
        entries.append(entry(run(f"models/m{m:03d}.onnx", layers=head_layers),
                             run(f"models/m{m:03d}.onnx", layers=base_layers), verdicts))
    return result(*entries)


def test_huge_result_fits_the_comment_limit_and_says_what_was_left_out() -> None:
    big = _big_result()
    text = render(big)
    assert comment_size(text) <= COMMENT_LIMIT_CHARS
    match = re.search(r"Trimmed to fit the 65,536-character comment limit: (\d+) rows left out",
                      text)
    assert match and int(match.group(1)) > 0
    # The most important rows survive: every failing model is in the summary table.
    for m in range(0, 120, 3):
        assert f"| models/m{m:03d}.onnx |" in text
    assert text.count("<details>") == text.count("</details>")


def test_detail_levels_share_what_they_show_alike(monkeypatch) -> None:
    """A large result is rendered at several levels before one fits; each entry's overview
    row and each block at a given detail are worked out once, not once per level."""
    from gate.report import markdown

    calls = {"rows": 0, "rules": 0}
    row, rules = markdown._overview_row, markdown._rule_results

    def counted_row(entry):
        calls["rows"] += 1
        return row(entry)

    def counted_rules(entry, out):
        calls["rules"] += 1
        rules(entry, out)

    monkeypatch.setattr(markdown, "_overview_row", counted_row)
    monkeypatch.setattr(markdown, "_rule_results", counted_rules)
    big = _big_result()
    text = render(big)
    assert "Trimmed to fit" in text  # several levels were rendered
    assert calls["rows"] == len(big.entries)
    # One block per entry and distinct (findings, layers, squeezed) detail, at most.
    details = {(limits.findings, limits.layers, level > 0)
               for level, limits in enumerate(markdown._LEVELS)}
    assert calls["rules"] <= len(big.entries) * len(details)
    monkeypatch.undo()
    # The same text as each level rendered on its own (a fresh share per level).
    alone = [markdown._render(big, limits, markdown._Shared.of(big), squeezed=level > 0)
             for level, limits in enumerate(markdown._LEVELS)]
    assert text == next(t for t in alone if comment_size(t) <= markdown.DEFAULT_BUDGET)


def test_small_budget_still_gives_a_valid_report() -> None:
    text = render(_big_result(models=30), budget=2_000)
    assert comment_size(text) <= 2_000
    assert text.startswith(MARKER) and "merge blocked" in text
    assert "left out" in text or "cut to fit" in text
    assert "\n1. models/m000.onnx on ws-64x64-4mib: rule max-param fails" in text


def test_emoji_count_as_two_code_units() -> None:
    assert comment_size("\u274c") == 1 and comment_size("\U0001f6d1") == 2
    assert comment_size(HOSTILE_NAME) == len(HOSTILE_NAME)


# --- the shared escaping helpers (gate/report/text.py; numbers: test_report_units.py) ---

def test_md_escape_neutralises_every_markup_character() -> None:
    from gate.report.text import md_escape

    assert md_escape("a|b") == "a\\|b"
    assert md_escape("*x* _y_ `z` [l](u) ~s~ $m$") == (
        "\\*x\\* \\_y\\_ \\`z\\` \\[l\\](u) \\~s\\~ \\$m\\$")
    assert md_escape("<img src=x onerror=alert(1)>") == "&lt;img src=x onerror=alert(1)&gt;"
    assert md_escape("@team") == "@&#8203;team"
    assert md_escape("# h") == "\\# h" and md_escape("a # h") == "a # h"
    assert md_escape("a\nb\r\x1b") == "a\\\\nb\\\\r\\\\x1b"


def test_expired_waiver_is_named_in_the_failed_rules_table() -> None:
    lapsed = finding(waiver_reason="approved for the demo", waiver_expires="2027-01-31")
    text = render(result(entry(run(), verdicts=(verdict(status=FAIL, findings=(lapsed,)),))))
    assert "blocks merge (waiver expired 2027-01-31: approved for the demo)" in text


def test_a_changed_layer_whose_columns_are_all_equal_names_what_did_change() -> None:
    """A reshape on a narrower tensor changes only its activation sizes and energy: the row
    must not read 'changed | = | = | = | =' (the change has to be visible somewhere)."""
    base = run(layers=(layer("stem/conv"), layer("head/merge", "Reshape", macs=0, param_bytes=0,
                                                 input_bytes=1024, energy_j=2e-7)))
    head = run(layers=(layer("stem/conv"), layer("head/merge", "Reshape", macs=0, param_bytes=0,
                                                 input_bytes=640, energy_j=1.5e-7)))
    rows = [row for row in _table_rows(render(result(entry(head, base)))) if "head/merge" in row]
    assert rows == [("| head/merge | Reshape | unchanged | unchanged | energy better by 50.0 nJ "
                     "(-25.0%); input size better by 384 B (-37.5%) |")]


def test_failing_models_are_open_and_passing_ones_folded() -> None:
    wake = "models/handheld/wakeword.onnx"
    passing = entry(run(wake, layers=(layer("gru", "GRU", latency_s=2e-5),)),
                    run(wake, layers=(layer("gru", "GRU", latency_s=3e-5),)))
    failing = entry(run(), run(), (verdict(status=FAIL),))
    text = render(result(failing, passing))
    folded = text.index("<details>")
    assert text.index("### fail \u00b7 models/trailcam/species.onnx") < folded
    assert text.index("### pass \u00b7 models/handheld/wakeword.onnx") > folded
    assert text.count("<details>") == 1  # one fold for every passing model, not one each


def test_worst_layer_is_the_largest_absolute_change_not_the_largest_percent() -> None:
    """A convolution +1.67 ms outranks a Relu +3100% (+45 us) in the overview and the layer
    table; the percent stays beside the amount."""
    base = run(layers=(layer("conv", latency_s=0.56e-3), layer("relu", "Relu", latency_s=1.45e-6)))
    head = run(layers=(layer("conv", latency_s=2.23e-3), layer("relu", "Relu", latency_s=46.45e-6)))
    text = render(result(entry(head, base)))
    overview = next(row for row in _table_rows(text) if "species.onnx" in row)
    assert overview.endswith("| conv |")
    rows = [row for row in _table_rows(text) if row.startswith(("| conv", "| relu"))]
    assert rows[0].startswith("| conv |") and "worse by 1.67 ms (+298%)" in rows[0]
    assert "worse by 45.0 us (+3103%)" in rows[1]


def _md_escape_per_character(text: str) -> str:
    """The first md_escape, one character at a time: the reference for the one-pass one."""
    from gate.report import text as t

    text = t.term_safe(text)
    out = []
    for position, char in enumerate(text):
        if char in t._MD_ENTITIES:
            out.append(t._MD_ENTITIES[char])
        elif char in t._MD_PUNCT or (position == 0 and char in t._MD_LEADING):
            out.append("\\" + char)
        else:
            out.append(char)
        following = text[position + 1:position + 2]
        if char == "#" and following and following in "0123456789":
            out.append(t._ZERO_WIDTH)
    return t._MD_AUTOLINK.sub(lambda m: m.group() + t._ZERO_WIDTH, "".join(out))


_MD_HOSTILE_CHARS = list("#-+=\\`*_[]|~$&<>\"@0123456789 aw.:/hgtpH\x00\n\x1b\u2028\x85\u00e9")


@settings(max_examples=500, deadline=None)
@given(st.text(alphabet=st.sampled_from(_MD_HOSTILE_CHARS), max_size=24) | st.text())
def test_md_escape_in_one_pass_writes_what_the_per_character_escape_wrote(text) -> None:
    from gate.report.text import md_escape

    assert md_escape(text) == _md_escape_per_character(text)
