"""``roofgate init``: a fresh repository gets a working gate; nothing is overwritten unasked.

Models are built in code (gate.synth); a Gemm layer's parameters are in x out x 4 bytes
(fp32) plus the bias (ONNX operator spec, Gemm), so the sizes below fit the 4 MiB
parameter buffer of ws-64x64-4mib. The Git LFS pointer layout is the Git LFS
specification's (docs/spec.md in the git-lfs repository).
"""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from click.testing import CliRunner

from gate.cli import cli
from gate.config import load_config
from gate.scaffold import WORKFLOWS, FoundModel, choose_dims
from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from tests.gitkit import Repo

ROOT = Path(__file__).resolve().parent.parent
POINTER = (b"version https://git-lfs.github.com/spec/v1\n"
           b"oid sha256:4d7a214614ab2935c943f9e0ff69d22eadbb8f32b1258daaa5e2ca24d17e2393\n"
           b"size 12345\n")


def fc(out_features: int, batch: int | str = 1, name: str = "fc") -> object:
    b = NetBuilder(name, weights="external")
    x = b.input("x", [batch, 256])
    b.output(b.gemm(x, out_features, name="fc"))
    return b.build()


def invoke(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, list(args))
    return result.exit_code, result.stdout + result.stderr


@pytest.fixture()
def repo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Repo:
    repo = Repo(tmp_path / "fresh")
    (repo.path / "models/cam").mkdir(parents=True)
    (repo.path / "models/odd[1]").mkdir(parents=True)
    save_model(fc(64), repo.path / "models/cam/a.onnx")
    save_model(fc(32, batch="batch"), repo.path / "models/odd[1]/b.onnx")  # symbolic batch
    repo.commit("models")
    monkeypatch.chdir(repo.path)
    return repo


def test_init_on_a_fresh_repository_then_check_passes(repo: Repo) -> None:
    code, out = invoke("init")
    assert code == 0, out
    assert "PASSED" in out and "git add roofgate.yaml policies/roofgate.yaml" in out
    config = yaml.safe_load((repo.path / "roofgate.yaml").read_text())
    assert config["dims"] == {"batch": 1}  # the batch-like dim it could see, bound to 1
    assert [g["paths"] for g in config["models"]] == [
        ["models/cam/*.onnx"], ["models/odd[[]1]/*.onnx"], ["**/*.onnx"]]
    loaded = load_config(repo.path / "roofgate.yaml", root=repo.path)
    assert loaded.is_model("models/odd[1]/b.onnx") and loaded.is_model("new/place/c.onnx")
    assert "name: team" in (repo.path / "policies/roofgate.yaml").read_text()
    repo.commit("roofgate init")
    repo.branch("pr")
    save_model(fc(48), repo.path / "models/cam/a.onnx")  # a smaller layer: no regression
    repo.commit("shrink a")
    code, out = invoke("check", "--base", "main")
    assert code == 0, out
    assert "models/cam/a.onnx" in out


def test_init_refuses_to_overwrite_without_force(repo: Repo) -> None:
    (repo.path / "roofgate.yaml").write_text("# mine\n")
    code, out = invoke("init", "--workflows")
    assert code == 2 and "roofgate.yaml already exist(s)" in out and "--force" in out
    assert (repo.path / "roofgate.yaml").read_text() == "# mine\n"
    assert not (repo.path / "policies").exists() and not (repo.path / ".github").exists()
    code, out = invoke("init", "--force")
    assert code == 0 and "# mine" not in (repo.path / "roofgate.yaml").read_text()


def test_init_writes_the_example_workflows_on_request(repo: Repo) -> None:
    code, out = invoke("init", "--workflows")
    assert code == 0, out
    for name in WORKFLOWS:
        written = (repo.path / ".github/workflows" / name).read_text()
        assert written == (ROOT / ".github/examples" / name).read_text()
    assert "replace the PIN placeholder" in out


def test_the_packaged_workflows_are_the_examples() -> None:
    # gate/templates/github/ ships in the wheel for `init --workflows`; it must not drift
    # from .github/examples/, which the docs and the workflow tests describe.
    for name in WORKFLOWS:
        assert (ROOT / "gate/templates/github" / name).read_text() == (
            ROOT / ".github/examples" / name).read_text(), name


def test_init_explains_what_to_fetch_for_an_lfs_pointer(repo: Repo) -> None:
    repo.write("models/big/large.onnx", POINTER)
    code, out = invoke("init")
    assert code == 0, out  # the readable models pass; the pointer is explained, not judged
    assert 'models/big/large.onnx: a Git LFS pointer, not the model; fetch it (git lfs pull ' \
           '--include="models/big/large.onnx")' in out
    assert "roofgate init --force" in out


def test_init_explains_a_model_it_cannot_open_instead_of_crashing(repo: Repo) -> None:
    """A model deleted from the working tree but still in the index, and a link to
    nothing (git-annex content not fetched), are listed by git but cannot be opened:
    init crashed (exit 3). The deleted one is gone (no glob is written for its folder);
    the link is named with the reason; the rest is gated."""
    (repo.path / "models/cam/a.onnx").unlink()
    (repo.path / "models/annexed.onnx").symlink_to("../.git/annex/objects/xx/m.onnx")
    code, out = invoke("init")
    assert code == 0, out
    assert "models/cam" not in out + (repo.path / "roofgate.yaml").read_text()
    assert "models/annexed.onnx: could not be read" in out
    assert "a link to a missing file" in out and "Traceback" not in out
    assert "PASS     models/odd[1]/b.onnx" in out


def test_init_names_the_dims_it_could_not_pick(repo: Repo) -> None:
    b = NetBuilder("seqnet", weights="external")
    x = b.input("x", ["tokens", 256])
    b.output(b.gemm(x, 64, name="proj"))
    (repo.path / "models/text").mkdir()
    save_model(b.build(), repo.path / "models/text/enc.onnx")
    code, out = invoke("init")
    assert "no value for the input dim(s) tokens: run roofgate init --force --dim tokens=N" in out
    assert "# dims: {tokens: N}" in (repo.path / "roofgate.yaml").read_text()
    code, out = invoke("init", "--force", "--dim", "tokens=128")
    assert code == 0, out
    assert yaml.safe_load((repo.path / "roofgate.yaml").read_text())["dims"] == {
        "batch": 1, "tokens": 128}


def test_choose_dims_binds_batch_names_and_keeps_given_values() -> None:
    models = [FoundModel("a.onnx", dims=("N", "seq")), FoundModel("b.onnx", dims=("batch_size",))]
    assert choose_dims(models, {}) == ({"N": 1, "batch_size": 1}, ("seq",))
    assert choose_dims(models, {"seq": 8, "N": 4}) == ({"N": 4, "batch_size": 1, "seq": 8}, ())


def test_init_outside_a_repository_says_so(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                           ) -> None:
    monkeypatch.chdir(tmp_path)
    code, out = invoke("init")
    assert code == 2 and "inside a git repository" in out
