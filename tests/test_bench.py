"""The benchmark's method (bench/measure.py, bench/table.py): whole processes taken in turns,
stopped at a limit, peak memory of the process itself, marginal cost per node.

No timings are asserted (performance claims live in bench/); these check that the
benchmark measures what it says it measures.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parent.parent / "bench"
sys.path.insert(0, str(BENCH))

import case_graphs
import measure
from measure import Sample, Series
from table import Goal


def _appender(log: Path, name: str) -> measure.Command:
    code = f"open({str(log)!r}, 'a').write({name!r})"
    return measure.python(code)


def test_rounds_take_turns_and_swap_who_goes_first(tmp_path: Path) -> None:
    log = tmp_path / "order.txt"
    series = measure.rounds({"A": _appender(log, "A"), "B": _appender(log, "B")}, 4)
    assert log.read_text() == "ABBAABBA"
    assert [s.runs for s in series.values()] == [4, 4]


def test_fixed_first_commands_open_every_round(tmp_path: Path) -> None:
    log = tmp_path / "order.txt"
    commands = {name: _appender(log, name) for name in "FPEC"}
    measure.rounds(commands, 3, fixed_first=("F", "P"))
    assert log.read_text() == "FPEC" "FPCE" "FPEC"


def test_a_process_past_its_limit_is_stopped_with_its_workers(tmp_path: Path) -> None:
    marker = tmp_path / "worker-finished"
    code = ("import subprocess, sys, time; subprocess.Popen([sys.executable, '-c', "
            f"\"import time; time.sleep(1.5); open({str(marker)!r}, 'w')\"]); time.sleep(30)")
    sample = measure.run_process(measure.python(code), timeout_s=0.5)
    assert sample.seconds is None and sample.limit_s == 0.5
    series = Series([sample])
    assert series.stopped and series.seconds is None and series.stopped_after == 0.5
    subprocess.run([sys.executable, "-c", "import time; time.sleep(2)"], check=True)
    assert not marker.exists()  # the worker went down with its process group


def test_processes_run_together_overlap_and_a_failure_fails_the_measurement(
        tmp_path: Path) -> None:
    """The side-by-side reference starts its processes at once: their lifetimes overlap
    (each writes when it starts and ends; no duration is asserted)."""
    def stamped(name: str) -> measure.Command:
        code = (f"import time; p = {str(tmp_path / name)!r}; open(p + '.start', 'w').write("
                "repr(time.time())); time.sleep(0.3); open(p + '.end', 'w').write("
                "repr(time.time()))")
        return measure.python(code)

    measure.run_together([stamped("a"), stamped("b")])
    at = {f"{n}.{e}": float((tmp_path / f"{n}.{e}").read_text())
          for n in "ab" for e in ("start", "end")}
    assert at["a.start"] < at["b.end"] and at["b.start"] < at["a.end"]
    with pytest.raises(measure.ProcessFailed):
        measure.run_together([stamped("c"), measure.python("raise SystemExit(3)")])


def test_peak_memory_is_the_child_s_own_not_the_driver_s() -> None:
    ballast = bytearray(400 * 2**20)  # the driver is large; a forked child would inherit it
    ballast[::4096] = b"x" * len(ballast[::4096])  # touch every page
    bare = measure.run_process(measure.python("pass"))
    big = measure.run_process(measure.python("b = bytearray(200 * 2**20); b[::4096] = "
                                             "b'x' * len(b[::4096])"))
    del ballast
    assert bare.peak_bytes < 100 * 2**20
    assert big.peak_bytes > 200 * 2**20


def test_an_unexpected_exit_code_fails_the_measurement() -> None:
    with pytest.raises(measure.ProcessFailed, match="exited 3"):
        measure.run_process(measure.python("raise SystemExit(3)"))


def _series(*seconds: float | None) -> Series:
    return Series([Sample(s, 0, 0, "", None if s is not None else 60.0) for s in seconds])


def test_marginal_cost_is_the_slope_between_sizes_not_total_over_size() -> None:
    # 1 s of start-up plus 10 us per node up to 100 nodes, then 30 us per node.
    results = {100: {"profile": _series(1.001)}, 200: {"profile": _series(1.004)}}
    assert case_graphs.marginal_slope(results, "profile") == pytest.approx(30e-6)
    assert case_graphs.marginal_us_per_node(results, "profile") == ["100->200: 30 us"]


def test_a_stopped_run_gives_a_lower_bound_that_fails_an_upper_goal() -> None:
    value, at_least = case_graphs.time_ratio_or_bound(_series(None), _series(5.0))
    assert at_least and value == pytest.approx(12.0)  # stopped at 60 s against 5 s
    assert Goal("<=", 3, "").verdict(value, at_least=True) == "missed"
    assert Goal("<=", 30, "").verdict(value, at_least=True) == "unknown"


@pytest.mark.parametrize(("op", "limit", "value", "verdict"), [
    ("<=", 0.8, 0.8, "met"), ("<=", 0.8, 0.81, "missed"), (">=", 1.7, 1.69, "missed"),
    (">=", 1.7, 2.0, "met"), ("<", 0.5, None, "not measured")])
def test_goal_verdicts(op: str, limit: float, value: float | None, verdict: str) -> None:
    assert Goal(op, limit, "").verdict(value) == verdict


@pytest.mark.slow
def test_quick_start_up_case_prints_its_rows_and_the_load() -> None:
    done = subprocess.run([sys.executable, str(BENCH / "run.py"), "--quick", "--only", "6",
                           "--markdown"], capture_output=True, text=True, check=True)
    rows = [line for line in done.stdout.splitlines() if line.startswith("| 6 |")]
    assert len(rows) == 4, done.stdout
    assert all(line.count("|") == 7 for line in rows)
    assert "Load average (1 min)" in done.stdout


def test_update_readme_replaces_only_the_block_between_the_markers(tmp_path: Path) -> None:
    import run

    readme = tmp_path / "README.md"
    readme.write_text(f"intro\n{run.README_BEGIN}\nold table\n{run.README_END}\nafter\n")
    run.update_readme("new table", readme)
    assert readme.read_text() == f"intro\n{run.README_BEGIN}\nnew table\n{run.README_END}\nafter\n"
    readme.write_text("no markers\n")
    with pytest.raises(SystemExit, match="markers not found"):
        run.update_readme("new table", readme)


def test_the_readme_holds_the_markers_the_benchmark_writes_between() -> None:
    import run

    text = (BENCH.parent / "README.md").read_text(encoding="utf-8")
    assert text.count(run.README_BEGIN) == 1 and text.count(run.README_END) == 1


def test_per_node_cost_against_the_floor_uses_the_whole_size_range() -> None:
    results = {10_000: {"floor": _series(1.0), "profile": _series(2.0)},
               100_000: {"floor": _series(1.2), "profile": _series(11.0)},
               200_000: {"floor": _series(1.1), "profile": _series(21.0)}}
    # profile (21 - 2) / 190k = 100 us; floor (1.1 - 1.0) / 190k = 0.5 us (its last step
    # is negative: noise), so the whole range is the figure.
    assert case_graphs.overall_slope(results, "profile") == pytest.approx(100e-6)
    assert case_graphs._slope_against_floor(results, "profile") == (
        "10k->200k: 100 us vs floor's 0.5 us (190.00x)")
