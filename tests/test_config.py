"""Project config (roofgate.yaml): groups, inheritance, overrides, globs, error reporting."""

from __future__ import annotations

from pathlib import Path

import pytest

from gate.config import (
    DEFAULT_MODEL_GLOB,
    Overrides,
    glob_match,
    glob_problem,
    load_config,
    parse_dim_bindings,
    resolve_file,
    resolve_target,
)
from gate.errors import ConfigError

CONFIG = """\
version: 1
targets: [ws-64x64-4mib]
policies: [policies/default.yaml]
dims: {batch: 1}
precision: int8
exclude: ["models/**/scratch/*.onnx"]
models:
  - paths: ["models/trailcam/**/*.onnx"]
    targets: [ws-64x64-4mib, os-16x16-512kib]
  - paths: ["models/handheld/*.onnx"]
    dims: {seq: 128}
    precision: int4
reports:
  junit: out/junit.xml
  markdown: out/summary.md
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "roofgate.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def test_groups_inherit_defaults_and_first_match_wins(tmp_path: Path) -> None:
    config = load_config(None, root=write(tmp_path, CONFIG).parent)
    trail = config.group_for("models/trailcam/sub/species.onnx")
    hand = config.group_for("models/handheld/wakeword.onnx")
    assert trail is not None and hand is not None
    assert trail.targets == ("ws-64x64-4mib", "os-16x16-512kib")
    assert trail.policies == ("policies/default.yaml",) and trail.precision == "int8"
    assert hand.targets == ("ws-64x64-4mib",)
    assert dict(hand.dims) == {"batch": 1, "seq": 128} and hand.precision == "int4"
    assert config.reports == {"junit": "out/junit.xml", "markdown": "out/summary.md"}


def test_exclude_and_unmatched_paths_are_not_models(tmp_path: Path) -> None:
    config = load_config(write(tmp_path, CONFIG))
    assert not config.is_model("models/trailcam/scratch/old.onnx")
    assert not config.is_model("models/other/x.onnx")  # no group covers it
    assert not config.is_model("models/handheld/deep/x.onnx")  # '*' stays in one folder


def test_command_line_overrides_every_group(tmp_path: Path) -> None:
    config = load_config(write(tmp_path, CONFIG), overrides=Overrides(
        targets=("vec-dsp-128",), policies=("/abs/p.yaml",), dims={"seq": 64}, precision="fp16"))
    for group in config.groups:
        assert group.targets == ("vec-dsp-128",) and group.policies == ("/abs/p.yaml",)
        assert group.precision == "fp16" and group.dims["seq"] == 64
    assert config.groups[0].dims["batch"] == 1  # dims merge, not replace


def test_all_problems_reported_at_once_with_lines_and_suggestions(tmp_path: Path) -> None:
    path = write(tmp_path, "version: 1\ntarget: [x]\nmodels:\n  - path: ['a/*.onnx']\n"
                           "    dims: {batch: -1}\n  - paths: ['/abs/*.onnx']\n    targets: [t]\n")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    text = "\n".join(info.value.problems)
    assert "roofgate.yaml:2: target: unknown key (did you mean 'targets'?)" in text
    assert "models[0].paths: required key is missing" in text
    assert "unknown key (did you mean 'paths'?)" in text
    assert "models[0].dims.batch: expected a positive whole number" in text
    assert "relative to the repository root" in text
    assert len(info.value.problems) >= 5


def test_unsupported_version_refused(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="version 2 is not supported"):
        load_config(write(tmp_path, "version: 2\ntargets: [t]\n"))


def test_without_a_file_every_onnx_is_a_model_and_a_target_is_required(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="pass --target"):
        load_config(None, root=tmp_path)
    config = load_config(None, root=tmp_path, overrides=Overrides(targets=("t",)))
    assert config.source is None and config.groups[0].paths == (DEFAULT_MODEL_GLOB,)
    assert config.is_model("a.onnx") and config.is_model("deep/er/b c.onnx")
    assert not config.is_model("a.onnx.txt")


def test_merge_may_skip_the_target_requirement(tmp_path: Path) -> None:
    config = load_config(write(tmp_path, "reports: {json: r.json}\n"), require_targets=False)
    assert config.reports == {"json": "r.json"}


@pytest.mark.parametrize("pattern,path,expected", [
    ("**/*.onnx", "a.onnx", True),
    ("**/*.onnx", "x/y/a.onnx", True),
    ("models/*.onnx", "models/x/a.onnx", False),
    ("models/**", "models/x/a.onnx", True),
    ("models/?.onnx", "models/a.onnx", True),
    ("models/[ab].onnx", "models/c.onnx", False),
    ("models/[!ab].onnx", "models/c.onnx", True),
    ("m (1)/*.onnx", "m (1)/a.onnx", True),  # regex characters are literal
    ("*.onnx", "-rf.onnx", True),
])
def test_glob_match(pattern: str, path: str, expected: bool) -> None:
    assert glob_match(pattern, path) is expected


def test_glob_problems() -> None:
    assert glob_problem("../x/*.onnx")
    assert glob_problem("C:/x")
    assert glob_problem("a\\b")
    assert glob_problem("") and not glob_problem("models/**/*.onnx")


def test_dim_bindings() -> None:
    assert parse_dim_bindings(["batch=1", "seq=128"]) == {"batch": 1, "seq": 128}
    with pytest.raises(ConfigError) as info:
        parse_dim_bindings(["batch", "seq=0", "x=1.5"])
    assert len(info.value.problems) == 3


def test_paths_resolve_from_the_config_folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                              ) -> None:
    (tmp_path / "sub").mkdir()
    config = load_config(write(tmp_path, "targets: [t]\n"))
    monkeypatch.chdir(tmp_path)
    assert resolve_file(config, "policies/p.yaml") == "policies/p.yaml"
    monkeypatch.chdir(tmp_path / "sub")
    assert Path(resolve_file(config, "policies/p.yaml")) == (tmp_path / "policies/p.yaml").resolve()
    assert resolve_target(config, "ws-64x64-4mib") == "ws-64x64-4mib"
