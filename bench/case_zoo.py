"""Cases 4-5: model zoos (audit and check at -j 1 and -j 2, a 2-shard matrix) and HTML cost."""

from __future__ import annotations

import statistics
from pathlib import Path

import inputs
import onnx
from context import Context, progress
from inputs import TARGET
from measure import SAFETY_S, Series, roofgate, rounds, run_process, run_together
from table import Goal, Row, pair_spread, ratio_text, rounds_text, seconds, time_ratio

SECOND_TARGET = "os-16x16-512kib"


def zoo_sizes(ctx: Context) -> dict[int, int]:
    """Zoo size -> rounds: three for both, since a goal's verdict rests on each (one round
    of the 1000-model zoo once read 1.78x where three read 1.58x)."""
    if ctx.quick:
        return {6: ctx.reps(1), 12: ctx.reps(1)}
    return {200: ctx.reps(3), 1000: ctx.reps(3)}


def zoo_repo(folder: Path, count: int, templates: list[onnx.ModelProto]) -> tuple[Path, int]:
    """A repository of ``count`` models whose pull request (branch pr) retrains every one
    (all weights new). Returns the repository and the bytes of one side's models."""
    repo = folder / "repo"
    inputs.new_repo(repo, inputs.project_config(Path("out"), html=False))
    size = inputs.write_zoo(repo, count, templates, side=0)
    inputs.commit_all(repo, "base")
    inputs.git(repo, "checkout", "-q", "-b", "pr")
    inputs.write_zoo(repo, count, templates, side=1)
    inputs.commit_all(repo, "every model retrained")
    return repo, size


def _speedup(j1: Series, j2: Series) -> float | None:
    return time_ratio(j1, j2)


def _parallel_row(label: str, count: int, s: dict[str, Series], goal: Goal | None) -> Row:
    value = _speedup(s["j1"], s["j2"])
    return Row("4", f"{label}, {count} models: `-j 1` vs `-j 2` ({rounds_text(s['j1'].runs)})",
               f"{seconds(s['j1'].seconds)} vs {seconds(s['j2'].seconds)}",
               f"speed-up {ratio_text(value)}" + pair_spread(s["j1"], s["j2"]),
               goal.text if goal else "- (goal set at another size)",
               goal.verdict(value) if goal else "-")


def _halves_row(repo: Path, folder: Path, count: int, runs: int) -> Row:
    """What two processes reach on this host: ``audit -j 1`` of the whole zoo against two
    ``audit -j 1`` of half the zoo each, started together (each pays its own start-up and
    writes its own reports). A reference for the ``-j 2`` row, not a goal: ``-j 2`` pays
    start-up and reports once, so it can beat this, but not by much on a zoo whose
    models take milliseconds each."""
    models = [inputs.zoo_path(i) for i in range(count)]
    halves = [models[: count // 2], models[count // 2:]]
    together = [roofgate("audit", "-j", "1", *half, "--junit", str(folder / f"half{k}.xml"),
                         "--markdown", str(folder / f"half{k}.md"),
                         "--json", str(folder / f"half{k}.json"), cwd=repo)
                for k, half in enumerate(halves)]
    whole = roofgate("audit", "-j", "1", cwd=repo)
    pairs = []
    for index in range(runs):  # in turns: the whole audit first, then the halves first
        if index % 2:
            side_by_side = run_together(together, SAFETY_S)
        alone = run_process(whole, SAFETY_S).seconds
        if index % 2 == 0:
            side_by_side = run_together(together, SAFETY_S)
        if alone is None:
            raise SystemExit(f"audit ran past {SAFETY_S:.0f} s")
        pairs.append((alone, side_by_side))
    alone_s = statistics.median(a for a, _ in pairs)
    both_s = statistics.median(b for _, b in pairs)
    speedups = [a / b for a, b in pairs]
    return Row("4", f"reference, {count} models: `audit -j 1` vs two `audit -j 1` of half the "
               f"zoo each, side by side ({rounds_text(runs)})",
               f"{seconds(alone_s)} vs {seconds(both_s)}",
               f"speed-up {ratio_text(statistics.median(speedups))} (rounds "
               f"{min(speedups):.2f}-{max(speedups):.2f})",
               "- (what two processes reach here)", "-")


def shard_rounds(repo: Path, folder: Path, runs: int) -> tuple[Series, list[float], bool]:
    """Unsharded ``audit -j 1`` against a 2-job matrix (shard 1, shard 2, merge; each a whole
    process, run one after the other as if each had the machine to itself), in turns.
    Returns the unsharded series, each round's critical path (slower shard + merge) and
    whether the merged JSON is byte-identical to the unsharded one."""
    unsharded_json, merged_json = folder / "unsharded.json", folder / "merged.json"
    unsharded = roofgate("audit", "-j", "1", "--json", str(unsharded_json), cwd=repo)
    shards = [roofgate("audit", "-j", "1", "--shard", f"{i}/2", "--shard-out",
                       str(folder / f"shard{i}.json"), cwd=repo) for i in (1, 2)]
    merge = roofgate("merge", *(str(folder / f"shard{i}.json") for i in (1, 2)),
                     "--json", str(merged_json), cwd=repo)
    series, critical = Series(), []
    for index in range(runs):
        if index % 2 == 0:
            series.samples.append(run_process(unsharded, SAFETY_S))
        parts = [run_process(command, SAFETY_S).seconds for command in (*shards, merge)]
        if any(part is None for part in parts):
            raise SystemExit(f"a shard or the merge ran past {SAFETY_S:.0f} s")
        s1, s2, merged = (part or 0.0 for part in parts)
        critical.append(max(s1, s2) + merged)
        if index % 2 == 1:
            series.samples.append(run_process(unsharded, SAFETY_S))
    same = unsharded_json.read_bytes() == merged_json.read_bytes()
    return series, critical, same


def _shard_row(count: int, unsharded: Series, critical: list[float], same: bool,
               goal: Goal | None) -> Row:
    path = statistics.median(critical)
    value = path / unsharded.seconds if unsharded.seconds else None
    return Row("4", f"2-shard matrix, {count} models: critical path (slower shard process + "
               f"merge process) vs unsharded `audit -j 1` ({rounds_text(len(critical))})",
               f"{seconds(path)} vs {seconds(unsharded.seconds)}; merged JSON identical: "
               f"{'yes' if same else 'NO'}", ratio_text(value),
               goal.text if goal else "- (goal set at another size)",
               (goal.verdict(value) if same else "missed") if goal else "-")


def case_zoos(ctx: Context) -> list[Row]:
    """Zoos of 200 and 1000 models with realistic (random fp32) inline weights."""
    templates = inputs.zoo_templates(ctx.quick)
    sizes = zoo_sizes(ctx)
    small, big = list(sizes)
    rows = []
    for count, runs in sizes.items():
        folder = ctx.work / f"zoo{count}"
        progress(f"case 4: writing a zoo of {count} models (two commits)")
        repo, size_bytes = zoo_repo(folder, count, templates)
        progress(f"case 4: {count} models, {size_bytes / 2**20:.0f} MiB per side, "
                 f"{runs} round(s)")
        progress(f"case 4: audit -j 1 vs -j 2, {count} models")
        audit = rounds({f"j{j}": roofgate("audit", "-j", str(j), cwd=repo) for j in (1, 2)},
                       runs)
        rows.append(_parallel_row(f"`audit` ({size_bytes / 2**20:.0f} MiB of weights)", count,
                                  audit, Goal(">=", 1.7, ">= 1.7x") if count == small else None))
        if count == small:
            progress(f"case 4: audit -j 1 vs two half-zoo audits side by side, {count} models")
            rows.append(_halves_row(repo, folder, count, runs))
        progress(f"case 4: 2-shard matrix vs unsharded, {count} models")
        unsharded, critical, same = shard_rounds(repo, folder, runs)
        rows.append(_shard_row(count, unsharded, critical, same,
                               Goal("<=", 0.65, "<= 0.65x") if count == small else None))
        progress(f"case 4: check -j 1 vs -j 2, {count} models")
        check = rounds({f"j{j}": roofgate("check", "--base", "main", "-j", str(j), cwd=repo)
                        for j in (1, 2)}, runs)
        rows.append(_parallel_row("`check`, every model changed", count, check,
                                  Goal(">=", 1.7, ">= 1.7x") if count == big else None))
    return rows


# --- 5. HTML -----------------------------------------------------------------------

def case_html(ctx: Context) -> list[Row]:
    """What ``--html`` adds to an audit, per model x target (whole processes, in turns)."""
    count = 2 if ctx.quick else 20
    folder = ctx.work / "html"
    inputs.write_zoo(folder, count, inputs.zoo_templates(ctx.quick), side=0)
    common = ("audit", str(folder / "models"), "-t", TARGET, "-t", SECOND_TARGET,
              "-p", "default", "-j", "1", "--json", str(ctx.work / "html.json"))
    s = rounds({"plain": roofgate(*common),
                "html": roofgate(*common, "--html", str(ctx.work / "report.html"))},
               ctx.reps(3))
    pairs = count * 2
    added = (s["html"].seconds - s["plain"].seconds) / pairs \
        if s["html"].seconds is not None and s["plain"].seconds is not None else None
    goal = Goal("<=", 0.3, "<= 0.3 s per model x target")
    return [Row("5", f"HTML report: `audit` of {count} models x 2 targets with vs without "
                f"`--html` ({rounds_text(s['html'].runs)})",
                f"{seconds(s['html'].seconds)} vs {seconds(s['plain'].seconds)}",
                f"{ratio_text(time_ratio(s['html'], s['plain']))}; "
                f"{added:+.3f} s per model x target" if added is not None else "n/a",
                goal.text, goal.verdict(added))]



