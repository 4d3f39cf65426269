"""Cases 6-7: start-up per command, and the earlier rows kept (fusion, folding, targets, demo)."""

from __future__ import annotations

import re
from pathlib import Path

import inputs
import onnx
from context import Context, assert_fully_modelled, profile_cmd
from inputs import TARGET
from measure import SAFETY_S, python, roofgate, rounds, run_process
from table import Goal, Row, pair_spread, ratio_text, rounds_text, seconds, time_ratio

BARE_CODE = "import click, yaml"


# --- 6. start-up ---------------------------------------------------------------------

def _shards_for_merge(ctx: Context) -> list[str]:
    """Two shard files of a two-model audit (external weights: a few KB each)."""
    from gate.synth.archs import mobilenet_v1
    from gate.synth.builder import save_model

    folder = ctx.work / "startup"
    for index in range(2):
        save_model(mobilenet_v1(width=0.25, resolution=96, batch=1),
                   folder / "models" / f"m{index}.onnx")
    shards = []
    for index in (1, 2):
        shard = folder / f"shard{index}.json"
        run_process(roofgate("audit", str(folder / "models"), "-t", TARGET, "-p", "default",
                             "--shard", f"{index}/2", "--shard-out", str(shard)), SAFETY_S)
        shards.append(str(shard))
    return shards


def case_startup(ctx: Context) -> list[Row]:
    """Each quick command against a bare interpreter that imports click and yaml."""
    shards = _shards_for_merge(ctx)
    merged = str(ctx.work / "startup" / "merged.json")
    commands = {"bare": python(BARE_CODE), "--help": roofgate("--help"),
                "--version": roofgate("--version"), "targets": roofgate("targets"),
                "merge": roofgate("merge", *shards, "--json", merged)}
    s = rounds(commands, ctx.reps(7))
    bare = s["bare"]
    goals = {"--help": (Goal("<=", 2.5, "<= 2.5x the bare start"), True),
             "--version": (Goal("<", 0.5, "< 0.5 s (absolute)"), False),
             "targets": (Goal("<", 0.5, "< 0.5 s (absolute)"), False),
             "merge": (None, False)}
    rows = []
    for name, (goal, on_ratio) in goals.items():
        value = time_ratio(s[name], bare)
        judged = value if on_ratio else s[name].seconds
        what = "`roofgate merge` of two small shards" if name == "merge" else f"`roofgate {name}`"
        rows.append(Row("6", f"{what} vs `python -c \"{BARE_CODE}\"` ({rounds_text(bare.runs)})",
                        f"{seconds(s[name].seconds)} vs {seconds(bare.seconds)}",
                        ratio_text(value) + pair_spread(s[name], bare),
                        goal.text if goal else "- (pays only what it uses)",
                        goal.verdict(judged) if goal else "-"))
    return rows


# --- 7. earlier rows ---------------------------------------------------------------------

def _fusion_rows(ctx: Context, resnet: Path) -> list[Row]:
    size = 1_000 if ctx.quick else 20_000
    chain = ctx.work / f"chain{size}.onnx"
    onnx.save(inputs.chain_model(size), str(chain))
    rows = []
    goal = Goal("<=", 1.1, "<= 1.1x")
    for label, path, runs in (("ResNet-18" if ctx.quick else "ResNet-50", resnet, ctx.reps(3)),
                              (f"{size:,}-node chain", chain, ctx.reps(2))):
        s = rounds({"fused": profile_cmd(path), "alone": profile_cmd(path, "--no-fusion")},
                   runs)
        value = time_ratio(s["fused"], s["alone"])
        rows.append(Row("7", f"`profile` {label}: fusion vs `--no-fusion` ({rounds_text(runs)})",
                        f"{seconds(s['fused'].seconds)} vs {seconds(s['alone'].seconds)}",
                        ratio_text(value) + pair_spread(s["fused"], s["alone"]), goal.text,
                        goal.verdict(value)))
    return rows


# Functions that fold constants, decide parameters and charge them, read by name (so a
# move between modules does not lose them); none of them calls another.
FOLDING_FUNCTIONS = ("folds", "is_parameter", "_fold", "absorbs_qdq", "deployed_dtypes",
                     "layer_precision", "_layer_params", "charge")
SHARE_CODE = """
import cProfile, pstats, sys
names = set(sys.argv.pop(1).split(","))
from gate.cli import main
profiler = cProfile.Profile()
try:
    profiler.runcall(main)
except SystemExit:
    pass
stats = pstats.Stats(profiler).stats
found = {k[2]: v[3] for k, v in stats.items() if k[2] in names and "/gate/" in k[0]}
total = sum(v[2] for v in stats.values())
sys.stderr.write(f"BENCH-SHARE {sum(found.values())} {total} {','.join(sorted(found))}\\n")
"""


def _folding_row(ctx: Context, resnet_view: Path) -> Row:
    size = 1_000 if ctx.quick else 20_000
    chain = ctx.work / "folding.onnx"
    onnx.save(inputs.folding_chain(size), str(chain))
    cells, shares, missing = [], [], set(FOLDING_FUNCTIONS)
    for label, path in (("ResNet-50, every weight behind a view" if not ctx.quick else
                         "ResNet-18 (views)", resnet_view), (f"{size:,} nodes, a third folded",
                                                            chain)):
        assert_fully_modelled(path)
        sample = run_process(roofgate(",".join(FOLDING_FUNCTIONS), "profile", str(path), "-t",
                                      TARGET, "--format", "json", code=SHARE_CODE), SAFETY_S)
        match = re.search(r"BENCH-SHARE (\S+) (\S+) (\S*)", sample.stderr)
        if not match:
            raise SystemExit(f"folding share: no result\n{sample.stderr[-2000:]}")
        folding, total = float(match[1]), float(match[2])
        missing -= set(match[3].split(","))
        shares.append(folding / total)
        cells.append(f"{label}: {folding:.2f} s of {total:.2f} s (under cProfile)")
    goal = Goal("<", 0.1, "< 10%")
    # Not in the profile: not called on these inputs (absorbs_qdq runs on Q/DQ nodes only),
    # or renamed (then this list needs the new name).
    note = f"; not called on these inputs: {', '.join(sorted(missing))}" if missing else ""
    return Row("7", "constant folding and parameter charging, share of `profile` time",
               "; ".join(cells) + note, ", ".join(f"{s:.1%}" for s in shares), goal.text,
               goal.verdict(max(shares)))


def case_earlier(ctx: Context) -> list[Row]:
    """Fusion vs --no-fusion, folding's share, 1 vs 4 targets, the demo."""
    from gate.synth.archs import resnet18, resnet50
    from gate.synth.builder import save_model
    from gate.synth.forms import rewrite_weights
    from gate.targets import builtin_target_names

    model = (resnet18 if ctx.quick else resnet50)(weights="inline", batch=1)
    resnet = save_model(model, ctx.work / "resnet.onnx")
    view = save_model(rewrite_weights(model, "view"), ctx.work / "resnet_view.onnx")
    rows = _fusion_rows(ctx, resnet)
    rows.append(_folding_row(ctx, view))
    r18 = save_model(resnet18(batch=1), ctx.work / "r18" / "model.onnx")
    every = [a for name in builtin_target_names() for a in ("-t", name)]
    s = rounds({"one": roofgate("profile", str(r18), "-t", TARGET, "--format", "json"),
                "all": roofgate("profile", str(r18), *every, "--format", "json")}, ctx.reps(3))
    count = len(builtin_target_names())
    rows.append(Row("7", f"ResNet-18 `profile` on {count} targets vs 1 ({rounds_text(s['one'].runs)})",
                    f"{seconds(s['all'].seconds)} vs {seconds(s['one'].seconds)}",
                    ratio_text(time_ratio(s["all"], s["one"])),
                    f"< {count / 2:g}x (the model is loaded once)",
                    Goal("<", count / 2, "").verdict(time_ratio(s["all"], s["one"]))))
    demo = run_process(roofgate("demo", "--keep", str(ctx.work / "demo")), SAFETY_S)
    rows.append(Row("7", "`roofgate demo` end to end (1 run)", seconds(demo.seconds), "-",
                    "< 60 s", Goal("<", 60, "").verdict(demo.seconds)))
    return rows
