"""Scale benchmarks of issue 17: whole roofgate processes, candidate and reference interleaved.

Run:  python bench/scale.py [--quick] [--runs N] [--only chain,zoo,check,shards]

* chain:  `evaluate --baseline` and `check` (one node changed, every node renumbered)
          against `profile` on the same N-node chain.
* zoo:    `audit -j 2` against `audit -j 1` on a zoo with inline weights.
* check:  `check -j 2` against `check -j 1` with every model of a zoo changed.
* shards: a 2-shard matrix's critical path (one shard process + `merge`) against the
          unsharded audit, per zoo size (where sharding starts to pay).

Each figure is the median of ``--runs`` pairs taken A B A B ... in fresh processes
(interpreter start and imports included); the load average is printed beside it,
since the machine may be shared. Inputs are generated in code; nothing is downloaded.
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
TARGET = "ws-64x64-4mib"
POLICY = str(ROOT / "gate" / "policies" / "default.yaml")
GIT_ENV = {"GIT_AUTHOR_NAME": "bench", "GIT_AUTHOR_EMAIL": "bench@example.invalid",
           "GIT_COMMITTER_NAME": "bench", "GIT_COMMITTER_EMAIL": "bench@example.invalid",
           "GIT_CONFIG_NOSYSTEM": "1"}


CPU_S: list[float] = []  # CPU seconds (user + system) of each process, in call order


def roofgate(args: Sequence[str], cwd: Path | None = None) -> float:
    """Wall seconds of one whole ``roofgate`` process; exit 0 or 1 expected. Its CPU
    seconds go to ``CPU_S``: on a shared machine they vary less than wall time, and for
    one-process runs (a shard, a merge, ``-j 1``) they are what an idle machine's wall
    time would be."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", "from gate.cli import main; main()", *args],
                          capture_output=True, text=True, check=False, cwd=cwd,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    seconds = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    CPU_S.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    if done.returncode not in (0, 1):
        raise SystemExit(f"roofgate {' '.join(args)} exited {done.returncode}:\n"
                         f"{done.stderr[-2000:]}")
    return seconds


def interleaved(tasks: Sequence[Callable[[], float]], runs: int) -> list[float]:
    """Medians of several measurements taken in turns, so load drifts hit all of them."""
    times: list[list[float]] = [[] for _ in tasks]
    for _ in range(runs):
        for k, task in enumerate(tasks):
            times[k].append(task())
    return [statistics.median(t) for t in times]


def load() -> str:
    return "load {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def git(repo: Path, *args: str) -> None:
    subprocess.run(["git", "-c", "commit.gpgsign=false", *args], cwd=repo, check=True,
                   capture_output=True, env={**os.environ, **GIT_ENV})


# --- inputs -------------------------------------------------------------------------

def chain(nodes: int, inserted_at: int | None = None):  # -> onnx.ModelProto
    """The benchmark chain (``bench/inputs.py``); ``inserted_at`` renumbers every later node."""
    from inputs import chain_model  # bench/ is on the path when this script runs

    return chain_model(nodes, inserted_at=inserted_at)


def zoo_model(i: int, variant: int = 0):  # -> onnx.ModelProto
    """The zoo of bench/run.py (MobileNet and recurrent classifiers, inline weights);
    ``variant`` 1 widens each model a little (a changed model)."""
    from gate.synth.archs import mobilenet_v1, recurrent_classifier

    if i % 3:  # not i % 2: the 2-shard deal would give one shard every MobileNet
        return mobilenet_v1(width=0.25 + 0.25 * (i % 4) + 0.125 * variant,
                            resolution=96 + 32 * (i % 3), batch=1, weights="inline")
    return recurrent_classifier("lstm" if i % 4 else "gru",
                                hidden_size=64 + 16 * (i % 5) + 8 * variant, seq=50, batch=1,
                                weights="inline")


def write_zoo(folder: Path, count: int, variant: int = 0) -> None:
    from gate.synth.builder import save_model

    for i in range(count):
        save_model(zoo_model(i, variant), folder / f"m{i:04d}" / "model.onnx")


# --- cases --------------------------------------------------------------------------

def bench_chain(work: Path, sizes: Sequence[int], runs: int) -> list[str]:
    return [_chain_row(work, size, runs) for size in sizes]


def _chain_row(work: Path, size: int, runs: int) -> str:
    import onnx

    repo = work / f"chain{size}"
    repo.mkdir()
    git(repo, "init", "-q", "-b", "main")
    (repo / "roofgate.yaml").write_text(f"targets: [{TARGET}]\npolicies: [{POLICY}]\n")
    model = repo / "model.onnx"
    onnx.save(chain(size), str(model))
    git(repo, "add", "-A")
    git(repo, "commit", "-q", "-m", "base")
    baseline = str(work / f"b{size}.json")
    roofgate(["baseline", str(model), "-t", TARGET, "-o", baseline])
    onnx.save(chain(size, inserted_at=size // 2), str(model))
    git(repo, "checkout", "-q", "-b", "pr")
    git(repo, "commit", "-q", "-am", "insert one node, renumber")
    profile, evaluate, check = interleaved([
        lambda: roofgate(["profile", str(model), "-t", TARGET], repo),
        lambda: roofgate(["evaluate", str(model), "-t", TARGET, "-p", POLICY,
                          "--baseline", baseline], repo),
        lambda: roofgate(["check", "--base", "main"], repo)], runs)
    return (f"chain {size:,} nodes (one inserted, all renumbered): profile "
            f"{profile:.2f} s, evaluate --baseline {evaluate:.2f} s "
            f"({evaluate / profile:.2f}x), check {check:.2f} s ({check / profile:.2f}x)"
            f" | goal <= 3x | {load()}")


def bench_zoo(work: Path, count: int, runs: int) -> list[str]:
    zoo = work / f"zoo{count}"
    write_zoo(zoo, count)
    common = ["audit", str(zoo), "-t", TARGET, "-p", POLICY, "--json"]
    one, two = interleaved([lambda: roofgate([*common, str(work / "z1.json"), "-j", "1"]),
                            lambda: roofgate([*common, str(work / "z2.json"), "-j", "2"])],
                           runs)
    same = (work / "z1.json").read_bytes() == (work / "z2.json").read_bytes()
    return [(f"audit {count} models: -j 1 {one:.2f} s, -j 2 {two:.2f} s, speed-up "
             f"{one / two:.2f}x (identical JSON: {same}) | goal >= 1.7x | {load()}")]


def bench_check(work: Path, count: int, runs: int) -> list[str]:
    repo = work / f"check{count}"
    write_zoo(repo / "models", count)
    (repo / "roofgate.yaml").write_text(f"targets: [{TARGET}]\npolicies: [{POLICY}]\n")
    git(repo, "init", "-q", "-b", "main")
    git(repo, "add", "-A")
    git(repo, "commit", "-q", "-m", "base")
    git(repo, "checkout", "-q", "-b", "pr")
    write_zoo(repo / "models", count, variant=1)
    git(repo, "commit", "-q", "-am", "every model changed")
    common = ["check", "--base", "main", "--json"]
    one, two = interleaved([lambda: roofgate([*common, "c1.json", "-j", "1"], repo),
                            lambda: roofgate([*common, "c2.json", "-j", "2"], repo)], runs)
    same = (repo / "c1.json").read_bytes() == (repo / "c2.json").read_bytes()
    return [(f"check {count} changed models: -j 1 {one:.2f} s, -j 2 {two:.2f} s, speed-up "
             f"{one / two:.2f}x (identical JSON: {same}) | goal >= 1.7x | {load()}")]


def bench_shards(work: Path, counts: Sequence[int], runs: int) -> list[str]:
    return [_shard_row(work, count, runs) for count in counts]


def _shard_row(work: Path, count: int, runs: int) -> str:
    zoo = work / f"shardzoo{count}"
    write_zoo(zoo, count)
    common = ["audit", str(zoo), "-t", TARGET, "-p", POLICY, "-j", "1"]
    shard_files = [str(work / f"s{count}-{i}.json") for i in (1, 2)]

    cpu: dict[str, list[float]] = {"whole": [], "path": []}

    def unsharded() -> float:
        seconds = roofgate([*common, "--json", str(work / "su.json")])
        cpu["whole"].append(CPU_S[-1])
        return seconds

    def critical() -> float:
        shards = [roofgate([*common, "--shard", f"{i}/2", "--shard-out", shard_files[i - 1]])
                  for i in (1, 2)]
        shard_cpu = max(CPU_S[-2:])
        merge = roofgate(["merge", *shard_files, "--json", str(work / "sm.json")])
        cpu["path"].append(shard_cpu + CPU_S[-1])
        return max(shards) + merge  # the matrix runs the shards side by side

    whole, path = interleaved([unsharded, critical], runs)
    whole_cpu, path_cpu = (statistics.median(cpu[k]) for k in ("whole", "path"))
    same = (work / "su.json").read_bytes() == (work / "sm.json").read_bytes()
    return (f"2 shards of {count} models: unsharded {whole:.2f} s, slower shard + merge "
            f"{path:.2f} s = {path / whole:.2f}x wall; CPU {whole_cpu:.2f} s vs "
            f"{path_cpu:.2f} s = {path_cpu / whole_cpu:.2f}x (identical JSON: {same}) "
            f"| goal <= 0.65x | {load()}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--only", default="chain,zoo,check,shards")
    opts = parser.parse_args()
    chosen = set(opts.only.split(","))
    with tempfile.TemporaryDirectory(prefix="roofgate-scale-") as tmp:
        work = Path(tmp)
        rows: list[str] = []
        if "chain" in chosen:
            rows += bench_chain(work, (10_000,) if opts.quick else (20_000, 100_000), opts.runs)
        if "zoo" in chosen:
            rows += bench_zoo(work, 40 if opts.quick else 200, opts.runs)
        if "check" in chosen:
            rows += bench_check(work, 40 if opts.quick else 1000, opts.runs)
        if "shards" in chosen:
            rows += bench_shards(work, (40,) if opts.quick else (50, 200, 800), opts.runs)
        for row in rows:
            print(row, flush=True)


if __name__ == "__main__":
    main()
