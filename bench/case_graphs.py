"""Cases 1-3: profile against its floor, external data, and chain graphs of growing size."""

from __future__ import annotations

import itertools
import os
from pathlib import Path

import inputs
import onnx
from context import FLOOR_CODE, Context, assert_fully_modelled, profile_cmd, progress
from inputs import TARGET
from measure import SAFETY_S, Command, Series, python, roofgate, rounds, run_process
from table import (
    Goal,
    Row,
    memory_ratio,
    mib,
    pair_spread,
    ratio_text,
    rounds_text,
    seconds,
    time_ratio,
)

# --- 1. ResNet-50 ------------------------------------------------------------------

def case_resnet(ctx: Context) -> list[Row]:
    """ResNet-50 with inline weights: profile against onnx.load + shape inference."""
    from gate.synth.archs import resnet18, resnet50
    from gate.synth.builder import save_model

    label = "ResNet-18" if ctx.quick else "ResNet-50"
    path = save_model((resnet18 if ctx.quick else resnet50)(weights="inline", batch=1),
                      ctx.work / "resnet.onnx")
    assert_fully_modelled(path)
    s = rounds({"floor": python(FLOOR_CODE, str(path)), "profile": profile_cmd(path)},
               ctx.reps(5))
    floor, prof = s["floor"], s["profile"]
    runs = rounds_text(floor.runs)
    t, m = time_ratio(prof, floor), memory_ratio(prof, floor)
    time_goal, memory_goal = Goal("<=", 0.8, "<= 0.8x"), Goal("<=", 0.5, "<= 0.5x")
    return [
        Row("1", f"{label} inline weights ({path.stat().st_size / 1e6:.0f} MB): `profile` "
            f"vs floor (fresh `python`: onnx.load + infer_shapes), time ({runs})",
            f"{seconds(prof.seconds)} vs {seconds(floor.seconds)}",
            ratio_text(t) + pair_spread(prof, floor), time_goal.text, time_goal.verdict(t)),
        Row("1", f"{label}: same, peak memory", f"{mib(prof.peak_bytes)} vs "
            f"{mib(floor.peak_bytes)}", ratio_text(m), memory_goal.text, memory_goal.verdict(m)),
    ]


# --- 2. external data -----------------------------------------------------------------

WATCH_CODE = (
    "import sys\n"
    "def _watch(event, args):\n"
    "    if event == 'open' and args and str(args[0]).endswith('weights.bin'):\n"
    "        sys.stderr.write('BENCH-OPENED ' + str(args[0]) + '\\n')\n"
    "sys.addaudithook(_watch)\n"
    "from gate.cli import main; main()\n")


def case_external(ctx: Context) -> list[Row]:
    """The same graph with 4 KiB and with 4 GiB of external weights (sparse file)."""
    small = inputs.mlp_with_external_data(ctx.work / "small", 16)  # 4 x 16*16*4 B = 4 KiB
    big = inputs.mlp_with_external_data(ctx.work / "big", 16384)  # 4 x 16384^2*4 B = 4 GiB
    assert_fully_modelled(small)
    args = ("-t", TARGET, "--format", "json")
    s = rounds({"small": roofgate("profile", str(small), *args, code=WATCH_CODE),
                "big": roofgate("profile", str(big), *args, code=WATCH_CODE)}, ctx.reps(5))
    opened = sorted({line for series in s.values() for sample in series.samples
                     for line in sample.stderr.splitlines() if line.startswith("BENCH-OPENED")})
    t, m = time_ratio(s["big"], s["small"]), memory_ratio(s["big"], s["small"])
    goal = Goal("<=", 1.1, "<= 1.1x time and memory, file never opened")
    verdict = "missed" if opened else ("met" if goal.verdict(t) == goal.verdict(m) == "met"
                                       else "missed")
    return [Row("2", f"external weights 4 GiB vs 4 KiB, `profile` ({rounds_text(s['big'].runs)})",
                f"{seconds(s['big'].seconds)} vs {seconds(s['small'].seconds)}; "
                f"{mib(s['big'].peak_bytes)} vs {mib(s['small'].peak_bytes)}",
                f"time {ratio_text(t)}, memory {ratio_text(m)}; data file opened: "
                f"{'YES' if opened else 'never'}", goal.text, verdict)]


# --- 3. chain graphs ---------------------------------------------------------------

STOP_FACTOR = 8.0  # evaluate/check stopped beyond this multiple of profile's time
CHAIN_COMMANDS = ("floor", "profile", "evaluate", "check")


def chain_sizes(ctx: Context) -> dict[int, tuple[int, float | None]]:
    """Graph size -> (rounds at most, seconds after which no further round starts).

    The budgets keep a full run near 25 minutes while the code is slow: a size whose
    first round took longer than its budget gets one round (the table says how many);
    ``--runs`` sets the rounds exactly, without budgets."""
    if ctx.quick:
        return {size: (ctx.reps(1), None) for size in (300, 600, 1_200, 2_400)}
    budgets = {10_000: (3, 60.0), 50_000: (3, 90.0), 100_000: (3, 120.0), 200_000: (2, 120.0)}
    return {size: (ctx.reps(runs), None if ctx.runs else budget_s)
            for size, (runs, budget_s) in budgets.items()}


def _chain_repo(folder: Path, nodes: int) -> Path:
    """A git repository whose pull request (branch pr) changes one node of the chain."""
    repo = folder / "repo"
    inputs.new_repo(repo, inputs.project_config(Path("out"), html=True))
    model = repo / "models" / "chain.onnx"
    model.parent.mkdir(parents=True)
    onnx.save(inputs.chain_model(nodes), str(model))
    inputs.commit_all(repo, "base")
    inputs.git(repo, "checkout", "-q", "-b", "pr")
    onnx.save(inputs.chain_model(nodes, inputs.middle_relu(nodes)), str(model))
    inputs.commit_all(repo, "one node changed")
    return repo


def _chain_commands(folder: Path, nodes: int, skip: set[str]) -> dict[str, Command]:
    """The commands measured on one graph size (those stopped at a smaller size left out)."""
    folder.mkdir(parents=True)
    path = folder / "chain.onnx"
    onnx.save(inputs.chain_model(nodes), str(path))
    commands = {"floor": python(FLOOR_CODE, str(path)), "profile": profile_cmd(path)}
    if "evaluate" not in skip:
        baseline = folder / "baseline.json"
        run_process(roofgate("baseline", str(path), "-t", TARGET, "-o", str(baseline),
                             ok_codes=(0,)), SAFETY_S)
        commands["evaluate"] = roofgate(
            "evaluate", str(path), "-t", TARGET, "-p", "default", "--baseline", str(baseline),
            "--json", str(folder / "evaluate.json"))
    if "check" not in skip:
        commands["check"] = roofgate("check", "--base", "main", cwd=_chain_repo(folder, nodes))
    return commands


def _stop_limit(name: str, series: dict[str, Series]) -> float:
    """Floor and profile run to the end; evaluate and check stop at STOP_FACTOR x profile."""
    if name in ("floor", "profile"):
        return SAFETY_S
    last = series["profile"].samples[-1].seconds
    return max(60.0, STOP_FACTOR * last) if last else SAFETY_S


def measure_chains(ctx: Context) -> dict[int, dict[str, Series]]:
    """Every command on every size, in rounds; a command stopped at one size is skipped
    at the larger sizes (it is already beyond its goal)."""
    assert_fully_modelled_chain(ctx)
    results: dict[int, dict[str, Series]] = {}
    skip: set[str] = set()
    for size, (runs, budget_s) in chain_sizes(ctx).items():
        progress(f"case 3: chain of {size:,} nodes, up to {runs} round(s), skipping "
                 f"{sorted(skip)}")
        commands = _chain_commands(ctx.work / f"chain{size}", size, skip)
        results[size] = rounds(commands, runs, fixed_first=("floor", "profile"),
                               time_limit=_stop_limit, budget_s=budget_s)
        skip |= {name for name, s in results[size].items() if s.stopped}
        progress(", ".join(f"{name} {seconds(s.seconds, s.stopped_after)}"
                           for name, s in results[size].items()))
    return results


def assert_fully_modelled_chain(ctx: Context) -> None:
    """The chain and its one-node change are fully modelled (else the rows time nothing)."""
    folder = ctx.work / "modelled"
    folder.mkdir()
    for name, model in (("base", inputs.chain_model(30)),
                        ("changed", inputs.chain_model(30, inputs.middle_relu(30)))):
        onnx.save(model, str(folder / f"{name}.onnx"))
        assert_fully_modelled(folder / f"{name}.onnx")


def _at(results: dict[int, dict[str, Series]], size: int, name: str) -> Series | None:
    return results.get(size, {}).get(name)


def size_label(size: int) -> str:
    return f"{size // 1000}k" if size >= 1000 and size % 1000 == 0 else f"{size:,}"


def time_ratio_or_bound(a: Series, b: Series) -> tuple[float | None, bool]:
    """The median time ratio, or (for a stopped candidate) the lower bound its limit gives."""
    if a.stopped and a.stopped_after and b.seconds:
        return a.stopped_after / b.seconds, True
    return time_ratio(a, b), False


def _cell(size: int, a: Series | None, b: Series | None, memory: bool) -> str:
    if a is None or b is None:
        return f"{size_label(size)}: not run (stopped at a smaller size)"
    if memory:
        return (f"{size_label(size)}: {mib(a.peak_bytes)} vs {mib(b.peak_bytes)} "
                f"({ratio_text(memory_ratio(a, b))})")
    value, at_least = time_ratio_or_bound(a, b)
    return (f"{size_label(size)}: {seconds(a.seconds, a.stopped_after)} vs "
            f"{seconds(b.seconds)} ({ratio_text(value, at_least=at_least)})")


def chain_row(results: dict[int, dict[str, Series]], name: str, reference: str,
              what: str, goal: Goal, goal_size: int, memory: bool = False) -> Row:
    """One row: the ratio at every size, judged at ``goal_size``."""
    cells = "; ".join(_cell(size, series.get(name), series.get(reference), memory)
                      for size, series in results.items())
    a, b = (results.get(goal_size, {}).get(key) for key in (name, reference))
    if a is None or b is None:
        value, at_least = None, False
    elif memory:
        value, at_least = memory_ratio(a, b), False
    else:
        value, at_least = time_ratio_or_bound(a, b)
    runs = "/".join(str(next(iter(s.values())).runs) for s in results.values())
    return Row("3", f"{what} (rounds per size: {runs})", cells,
               f"{size_label(goal_size)}: {ratio_text(value, at_least=at_least)}",
               f"{goal.text} at {size_label(goal_size)}",
               goal.verdict(value, at_least=at_least))


def marginal_us_per_node(results: dict[int, dict[str, Series]], name: str) -> list[str]:
    """(t(b) - t(a)) / (b - a) between consecutive sizes, in microseconds per node."""
    sizes = list(results)
    cells = []
    for small, big in itertools.pairwise(sizes):
        a, b = results[small].get(name), results[big].get(name)
        if a is None or b is None or a.seconds is None or b.seconds is None:
            cells.append(f"{size_label(small)}->{size_label(big)}: n/a")
            continue
        slope = (b.seconds - a.seconds) / (big - small) * 1e6
        cells.append(f"{size_label(small)}->{size_label(big)}: {slope:.0f} us")
    return cells


def marginal_slope(results: dict[int, dict[str, Series]], name: str) -> float | None:
    """Seconds per node between the two biggest sizes."""
    small, big = list(results)[-2:]
    a, b = results[small].get(name), results[big].get(name)
    if a is None or b is None or a.seconds is None or b.seconds is None:
        return None
    return (b.seconds - a.seconds) / (big - small)


def overall_slope(results: dict[int, dict[str, Series]], name: str) -> float | None:
    """Seconds per node between the smallest and the biggest size (the floor's steps are
    within the noise of its start-up; the whole range is not)."""
    small, big = min(results), max(results)
    a, b = results[small].get(name), results[big].get(name)
    if a is None or b is None or a.seconds is None or b.seconds is None:
        return None
    return (b.seconds - a.seconds) / (big - small)


def _slope_against_floor(results: dict[int, dict[str, Series]], name: str) -> str:
    slope, floor = overall_slope(results, name), overall_slope(results, "floor")
    span = f"{size_label(min(results))}->{size_label(max(results))}"
    if slope is None or floor is None:
        return f"{span}: n/a"
    if floor <= 0:
        return f"{span}: {slope * 1e6:.0f} us vs floor's within noise"
    return (f"{span}: {slope * 1e6:.0f} us vs floor's {floor * 1e6:.1f} us "
            f"({ratio_text(slope / floor)})")


def case_chains(ctx: Context) -> list[Row]:
    """Chain graphs of growing size: profile vs its floor, evaluate and check vs profile."""
    results = measure_chains(ctx)
    goal_size = 100_000 if not ctx.quick else list(results)[-2]
    rows = [
        chain_row(results, "profile", "floor", "`profile` vs floor, time", Goal("<=", 2, "<= 2x"),
                  goal_size),
        chain_row(results, "profile", "floor", "`profile` vs floor, peak memory",
                  Goal("<=", 1.5, "<= 1.5x"), goal_size, memory=True),
        chain_row(results, "evaluate", "profile",
                  "`evaluate --baseline` (snapshot of the same graph) vs `profile`, time",
                  Goal("<=", 3, "<= 3x"), goal_size),
        chain_row(results, "check", "profile", "`check`, one node changed (git repository, "
                  "both sides read from git, JSON+markdown+JUnit+HTML) vs `profile`, time",
                  Goal("<=", 3, "<= 3x"), goal_size),
    ]
    for name in CHAIN_COMMANDS:
        rows.append(Row("3", f"marginal cost per node, `{name}`",
                        ", ".join(marginal_us_per_node(results, name)),
                        _slope_against_floor(results, name) if name != "floor" else "-"))
    rows.append(report_sizes(ctx, results))
    return rows


def report_sizes(ctx: Context, results: dict[int, dict[str, Series]]) -> Row:
    """Report files `check` wrote on the biggest graph it finished."""
    goal = Goal("<", 5, "HTML < 5 MB at 200k")
    done = [size for size, series in results.items()
            if "check" in series and not series["check"].stopped]
    if not done:
        return Row("3", "report sizes of `check`", "check never finished", "n/a", goal.text,
                   "not measured")
    size = done[-1]
    folder = ctx.work / f"chain{size}" / "repo" / "out"
    out = {"JSON": folder / "result.json", "HTML": folder / "report.html",
           "markdown": folder / "summary.md", "JUnit": folder / "junit.xml"}
    cells = ", ".join(f"{name} {_size_text(os.path.getsize(path))}"
                      for name, path in out.items() if os.path.exists(path))
    html_mb = os.path.getsize(out["HTML"]) / 1e6 if os.path.exists(out["HTML"]) else None
    verdict = goal.verdict(html_mb) if size == max(results) else "not measured at 200k"
    return Row("3", f"report sizes of `check` on the {size_label(size)}-node graph", cells,
               "-", goal.text, verdict)


def _size_text(size_bytes: int) -> str:
    return f"{size_bytes / 1e6:.1f} MB" if size_bytes >= 100_000 else f"{size_bytes / 1e3:.1f} kB"
