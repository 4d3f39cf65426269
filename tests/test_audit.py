"""Audit engine: shard deal, order-independent combining, shard files, trend, progress."""

from __future__ import annotations

import contextlib
import io
import json
import random
import time
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gate import costmodel, jobs, judge, shards, trend
from gate.errors import InputError
from gate.result import FAIL, ModelError, result_to_dict
from tests.recordkit import entry, finding, layer, result, run, verdict


def per_model_results(count: int = 7) -> list:
    out = []
    for k in range(count):
        model = f"models/m{k}.onnx"
        base = run(model=model)
        head = run(model=model, layers=(layer("stem/conv", latency_s=1e-5 * (1 + k % 3)),))
        status = FAIL if k % 2 else "pass"
        v = verdict(status=status, model=model, findings=(finding(),) if status == FAIL else ())
        errors = (ModelError(f"models/bad{k}.onnx", "not ONNX"),) if k == 3 else ()
        out.append(result(entry(head, base, (v,)), errors=errors, notes=(f"n{k % 2}",),
                          command="audit"))
    return out


@settings(max_examples=30, deadline=None)
@given(st.integers(min_value=1, max_value=12), st.integers(min_value=0, max_value=40))
def test_shards_partition_the_sorted_models(count: int, models_total: int) -> None:
    models = [f"m/{k:03d}.onnx" for k in range(models_total)]
    random.Random(count).shuffle(models)
    shares = [shards.shard_share(models, i, count) for i in range(1, count + 1)]
    assert sorted(m for share in shares for m in share) == sorted(models)
    assert max(map(len, shares)) - min(map(len, shares)) <= 1  # balanced within one model
    assert shares == [shards.shard_share(sorted(models), i, count) for i in range(1, count + 1)]


def test_combining_is_order_and_grouping_independent() -> None:
    parts = per_model_results()
    whole = judge.combine_results(parts, "audit")
    shuffled = parts[:]
    random.Random(1).shuffle(shuffled)
    grouped = [judge.combine_results(shuffled[:3], "audit"),
               judge.combine_results(shuffled[3:], "audit")]
    assert judge.combine_results(grouped, "audit") == whole
    assert [e.model for e in whole.entries] == sorted(e.model for e in whole.entries)
    assert whole.notes == ("n0", "n1") and len(whole.errors) == 1


def test_allow_errors_only_when_every_erroring_part_allows() -> None:
    ok = result(entry(run()), command="audit")
    bad = replace(result(errors=(ModelError("a.onnx", "x"),), command="audit"), allow_errors=True)
    strict = result(errors=(ModelError("b.onnx", "y"),), command="audit")
    assert judge.combine_results([ok], "audit").allow_errors is False
    assert judge.combine_results([ok, bad], "audit").allow_errors is True
    assert judge.combine_results([ok, bad, strict], "audit").allow_errors is False


def write_shards(tmp_path: Path, count: int) -> tuple[list[str], object]:
    parts = per_model_results()
    models = [p.entries[0].model for p in parts]
    paths = []
    for index in range(1, count + 1):
        mine = set(shards.shard_share(models, index, count))
        shard = judge.combine_results([p for p in parts if p.entries[0].model in mine], "audit")
        path = str(tmp_path / f"shard-{index}.json")
        shards.write_shard(path, shard, index, count, models)
        paths.append(path)
    return paths, judge.combine_results(parts, "audit")


def test_shard_files_merge_to_the_unsharded_result(tmp_path: Path) -> None:
    paths, whole = write_shards(tmp_path, 3)
    merged = shards.read_shards(list(reversed(paths)))
    assert json.dumps(result_to_dict(merged)) == json.dumps(result_to_dict(whole))


def test_merge_refuses_missing_duplicate_and_foreign_shards(tmp_path: Path) -> None:
    paths, _ = write_shards(tmp_path, 3)
    with pytest.raises(InputError, match=r"missing shard\(s\) 2/3"):
        shards.read_shards([paths[0], paths[2]])
    with pytest.raises(InputError, match="given twice"):
        shards.read_shards([paths[0], paths[0], paths[1], paths[2]])
    other = json.loads(Path(paths[1]).read_text())
    other["models_digest"] = "0" * 64
    Path(paths[1]).write_text(json.dumps(other))
    with pytest.raises(InputError, match="same roofgate version and checkout"):
        shards.read_shards(paths)
    other["version"] = 99
    Path(paths[1]).write_text(json.dumps(other))
    with pytest.raises(InputError, match="version 99 is not supported"):
        shards.read_shards(paths)
    Path(paths[1]).write_text("{not json")
    with pytest.raises(InputError, match="not a readable shard"):
        shards.read_shards(paths)
    with pytest.raises(InputError, match="file not found"):
        shards.read_shards([str(tmp_path / "nope.json")])


@pytest.mark.parametrize("text,expected", [("1/1", (1, 1)), ("3/4", (3, 4))])
def test_parse_shard(text: str, expected: tuple[int, int]) -> None:
    assert shards.parse_shard(text) == expected


@pytest.mark.parametrize("text", ["0/4", "5/4", "1/0", "a/b", "2", "-1/3"])
def test_parse_shard_refuses(text: str) -> None:
    with pytest.raises(InputError, match="--shard"):
        shards.parse_shard(text)


def test_trend_names_better_and_worse_models() -> None:
    slow = run(model="models/slow.onnx", layers=(layer("a", latency_s=2e-5),))
    fast = run(model="models/fast.onnx", layers=(layer("a", latency_s=5e-6),))
    same = run(model="models/same.onnx")
    base_slow = run(model="models/slow.onnx", layers=(layer("a", latency_s=1e-5),))
    base_fast = run(model="models/fast.onnx", layers=(layer("a", latency_s=1e-5),))
    res = result(entry(slow, base_slow), entry(fast, base_fast), entry(same, run(
        model="models/same.onnx")), entry(run(model="models/new.onnx")))
    notes = trend.trend_notes(res)
    assert notes[0].startswith("Trend vs the previous snapshot: 1 worse, 1 better, 1 unchanged")
    assert "worse: models/slow.onnx on ws-64x64-4mib: latency +100.0%" in notes
    assert "better: models/fast.onnx on ws-64x64-4mib: latency -50.0%" in notes
    assert trend.trend_notes(result(entry(run()))) == []  # no previous snapshot: no trend


def test_progress_plain_lines_off_a_terminal_and_a_bar_on_one() -> None:
    plain = io.StringIO()
    progress = jobs.Progress(plain, tty=False)
    progress(1, 2, "models/a\x1b[2J.onnx")
    progress(2, 2, "models/b.onnx")
    assert plain.getvalue().splitlines() == [
        "roofgate audit: [1/2] models/a\\x1b[2J.onnx", "roofgate audit: [2/2] models/b.onnx"]
    bar = io.StringIO()
    progress = jobs.Progress(bar, tty=True)
    progress(1, 4, "a.onnx")
    progress(4, 4, "b.onnx")
    text = bar.getvalue()
    assert text.startswith("\r1/4 [######..................] a.onnx")
    assert "\r4/4 [########################] b.onnx" in text and text.endswith("\n")


def test_default_processes() -> None:
    import os

    from gate.forked import default_processes

    assert default_processes(3) == 3 and default_processes(0) == (os.cpu_count() or 1)


def test_a_bug_in_a_worker_process_stops_the_run_as_an_internal_error(tmp_path, monkeypatch):
    """A worker cannot send its exception back (tracebacks do not pickle): it sends the text,
    and run_jobs raises it as an InternalError (exit 3), never as a model error."""
    from gate.errors import InternalError
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    def crash(*args, **kwargs):
        raise ZeroDivisionError("simulated bug")

    b = NetBuilder("fc")
    b.output(b.gemm(b.input("x", [1, 16]), 8, name="fc"))
    save_model(b.build(), tmp_path / "m.onnx")
    job = jobs.Job(model="models/m.onnx", file=str(tmp_path / "m.onnx"),
                   targets=("ws-64x64-4mib",))
    monkeypatch.setattr(costmodel, "cost_model", crash)
    outcome = jobs._analyse_job_in_worker(job)
    assert outcome.internal.startswith("ZeroDivisionError: simulated bug") and not outcome.runs
    assert not outcome.error  # not blamed on the model
    monkeypatch.setattr(jobs, "_analyse_in_process", jobs._analyse_job_in_worker)
    with pytest.raises(InternalError, match="models/m.onnx.*ZeroDivisionError"):
        jobs.run_jobs([job], workers=1)


def test_worker_records_are_what_a_json_round_trip_gives_back(tmp_path) -> None:
    """Workers send records as they are (pickled), not as dicts: they must equal, key order
    included, what a shard file read back holds, or merged reports would differ."""
    import pickle

    from gate.records import canonical_run, run_from_dict, run_to_dict
    from gate.synth.archs import mobilenet_v1
    from gate.synth.builder import save_model

    save_model(mobilenet_v1(width=0.25, resolution=64, batch=1), tmp_path / "m.onnx")
    job = jobs.Job(model="models/m.onnx", file=str(tmp_path / "m.onnx"),
                   targets=("ws-64x64-4mib", "os-16x16-512kib"))
    outcome = pickle.loads(pickle.dumps(jobs._analyse_job_in_worker(job)))
    assert len(outcome.runs) == 2
    for sent in outcome.runs:
        read_back = run_from_dict(json.loads(json.dumps(run_to_dict(sent))))
        assert sent == read_back == canonical_run(read_back)
        assert list(sent.metrics) == list(read_back.metrics)
        assert list(sent.target_figures) == list(read_back.target_figures)
        assert [list(x.metrics) for x in sent.layers] == [list(x.metrics) for x in read_back.layers]
        assert [type(x.fused_ops) for x in sent.layers] == [tuple] * len(sent.layers)


def test_jobs_read_their_git_blobs_where_they_are_analysed(tmp_path) -> None:
    """A check job names its git blob; the process that analyses it reads it (the parent
    never starts a git reader when workers do the work), and a blob git cannot give
    comes back through ``unread``, never as a result."""
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder
    from tests.gitkit import Repo

    repo = Repo(tmp_path / "repo")
    for k in range(5):
        b = NetBuilder("fc")
        b.output(b.gemm(b.input("x", [1, 16]), 8 + k, name="fc"))
        save_model(b.build(), repo.path / f"models/m{k}.onnx")
    commit = repo.commit("models")
    paths = [f"models/m{k}.onnx" for k in range(5)] + ["models/missing.onnx"]
    all_jobs = [jobs.Job(model=path, file=path, targets=("ws-64x64-4mib",),
                         blob=jobs.GitBlob(str(repo.path), commit, path, "head",
                                           str(tmp_path / f"spill{i}.onnx")))
                for i, path in enumerate(paths)]
    for workers in (1, 2):
        why: dict[str, str] = {}
        try:
            out = jobs.run_jobs(all_jobs, workers, unread=why.__setitem__)
            started_here = bool(jobs._BLOB_READERS)
        finally:
            jobs.close_blob_readers()
        assert sorted(out) == paths[:5]
        assert all(runs and not error for runs, error in out.values())
        assert [r.layers[0].metrics["macs"] for r in (out[p][0][0] for p in paths[:5])] == \
            [16 * (8 + k) for k in range(5)]  # each side's own blob: a Gemm of 16 x (8 + k)
        assert list(why) == ["models/missing.onnx"]
        assert why["models/missing.onnx"].startswith("cannot read the head side from git")
        assert started_here == (workers == 1)
        assert not jobs._BLOB_READERS


def _three_gemm_jobs(folder: Path) -> list[jobs.Job]:
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    out = []
    for k in range(3):
        b = NetBuilder("fc")
        b.output(b.gemm(b.input("x", [1, 16]), 8 + k, name="fc"))
        save_model(b.build(), folder / f"m{k}.onnx")
        out.append(jobs.Job(model=f"m{k}.onnx", file=str(folder / f"m{k}.onnx"),
                            targets=("ws-64x64-4mib",)))
    return out


def test_workers_started_early_do_the_next_run_and_end_with_it(tmp_path) -> None:
    """``workers_started`` forks the workers before the run is planned; the run inside the
    block takes them (the same results as in this process) and leaves no process behind."""
    import multiprocessing

    work = _three_gemm_jobs(tmp_path)
    alone = jobs.run_jobs(work, 1)
    with jobs.workers_started(2):
        assert len(jobs._STARTED) == 1 and len(multiprocessing.active_children()) == 2
        parallel = jobs.run_jobs(work, 2)
        assert not jobs._STARTED  # taken by the run
    assert parallel == alone and sorted(parallel) == ["m0.onnx", "m1.onnx", "m2.onnx"]
    assert not multiprocessing.active_children()


def test_workers_are_not_started_early_beyond_one_per_cpu(tmp_path, monkeypatch) -> None:
    """``-j 64`` on two CPUs for three models: no early pool of 64 processes each holding
    the analysis stack; the run starts one per model, as it always did."""
    import multiprocessing
    import os

    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    work = _three_gemm_jobs(tmp_path)
    with jobs.workers_started(64):
        assert not jobs._STARTED and not multiprocessing.active_children()
        assert sorted(jobs.run_jobs(work, 64)) == ["m0.onnx", "m1.onnx", "m2.onnx"]


@pytest.mark.parametrize("how", ["unused", "error", "no jobs"])
def test_workers_started_but_not_used_are_stopped(tmp_path, how: str) -> None:
    """A command that ends before its run (a config error, nothing changed) stops the
    workers it started at once, leaving no process and no pool for a later run."""
    import multiprocessing

    expected = pytest.raises(ValueError) if how == "error" else contextlib.nullcontext()
    with expected, jobs.workers_started(2):
        if how == "error":
            raise ValueError("a config error before the run")
        if how == "no jobs":
            assert jobs.run_jobs([], 2) == {}
    assert not jobs._STARTED
    deadline = time.monotonic() + 10  # terminated: gone within moments (the executor's own
    while multiprocessing.active_children() and time.monotonic() < deadline:  # thread reaps)
        time.sleep(0.05)
    assert not multiprocessing.active_children()


def test_a_worker_process_that_dies_is_exit_3(tmp_path, monkeypatch) -> None:
    """A worker killed mid-model (here it exits at once) breaks the pool: the run stops
    with exit 3 and one line, never a partial pass."""
    import multiprocessing
    import os

    from click.testing import CliRunner

    from gate.cli import cli
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    if multiprocessing.get_start_method() != "fork":
        pytest.skip("the simulated crash reaches workers only when they are forked")
    for k in range(3):
        b = NetBuilder("fc")
        b.output(b.gemm(b.input("x", [1, 16]), 8 + k, name="fc"))
        save_model(b.build(), tmp_path / f"zoo/m{k}.onnx")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(jobs, "analyse", lambda *a, **k: os._exit(7))
    done = CliRunner().invoke(cli, ["audit", "zoo", "-t", "ws-64x64-4mib", "-p", "default",
                                    "-j", "2", "--json", "r.json"])
    assert done.exit_code == 3, done.output
    assert "internal error" in done.output and "Traceback" not in done.output
    assert not (tmp_path / "r.json").exists()
