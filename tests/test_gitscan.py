"""Git plumbing: changed models (renames, additions, deletions), hostile names, LFS, refs."""

from __future__ import annotations

from pathlib import Path

import pytest

from gate import gitscan
from gate.errors import InputError
from tests.gitkit import Repo

# File names a shell would mangle: spaces, quotes, a leading dash, unicode, a newline,
# a dollar sign and a backtick (command substitution if ever interpolated).
HOSTILE = ["models/with space.onnx", "models/quote'\"d.onnx", "models/-rf.onnx",
           "models/ünï çødé 模型.onnx", "models/new\nline.onnx", "models/$(touch pwned)`x`.onnx"]


def is_onnx(path: str) -> bool:
    return path.endswith(".onnx")


@pytest.fixture()
def repo(tmp_path: Path) -> Repo:
    repo = Repo(tmp_path / "r")
    repo.write("models/keep.onnx", b"keep-v1" * 50)
    repo.write("models/change.onnx", b"change-v1" * 50)
    repo.write("models/gone.onnx", b"gone" * 50)
    repo.write("models/move.onnx", b"move-me-unchanged" * 50)
    repo.write("README.md", "hello\n")
    repo.commit("base")
    repo.branch("pr")
    repo.write("models/change.onnx", b"change-v2" * 50)
    (repo.path / "models/gone.onnx").unlink()
    (repo.path / "models/moved").mkdir()
    (repo.path / "models/move.onnx").rename(repo.path / "models/moved/here.onnx")
    repo.write("models/added.onnx", b"brand new" * 50)
    repo.write("README.md", "changed\n")
    repo.commit("pr")
    return repo


def test_changed_models_follow_renames_and_handle_add_delete(repo: Repo) -> None:
    base = gitscan.merge_base("main", repo.path)
    changes = gitscan.changed_models(base, repo.path, is_onnx)
    got = {(c.status, c.base_path, c.head_path) for c in changes}
    assert got == {
        ("modified", "models/change.onnx", "models/change.onnx"),
        ("deleted", "models/gone.onnx", None),
        ("renamed", "models/move.onnx", "models/moved/here.onnx"),
        ("added", None, "models/added.onnx"),
    }
    assert [c.path for c in changes] == sorted(c.path for c in changes)


def test_read_blob_reads_each_side_from_git(repo: Repo) -> None:
    base = gitscan.merge_base("main", repo.path)
    assert gitscan.read_blob(base, "models/change.onnx", repo.path) == b"change-v1" * 50
    assert gitscan.read_blob("HEAD", "models/change.onnx", repo.path) == b"change-v2" * 50


def test_hostile_file_names_round_trip_without_a_shell(tmp_path: Path) -> None:
    repo = Repo(tmp_path / "h")
    repo.write("base.txt", "x")
    repo.commit("base")
    repo.branch("pr")
    for k, name in enumerate(HOSTILE):
        repo.write(name, f"model {k}".encode() * 20)
    repo.commit("hostile")
    base = gitscan.merge_base("main", repo.path)
    changes = gitscan.changed_models(base, repo.path, is_onnx)
    assert sorted(c.head_path for c in changes) == sorted(HOSTILE)
    for k, name in enumerate(HOSTILE):
        assert gitscan.read_blob("HEAD", name, repo.path) == f"model {k}".encode() * 20
    assert not (repo.path / "models" / "pwned").exists() and not Path("pwned").exists()


def test_parse_name_status_with_renames_and_copies() -> None:
    raw = b"M\0a b.onnx\0R087\0old.onnx\0new.onnx\0C100\0src.onnx\0copy.onnx\0D\0-x.onnx\0A\0y\0"
    assert gitscan.parse_name_status(raw) == [
        ("M", "a b.onnx", "a b.onnx"), ("R", "old.onnx", "new.onnx"),
        ("C", "src.onnx", "copy.onnx"), ("D", "-x.onnx", None), ("A", None, "y"),
    ]


@pytest.mark.parametrize("letter,old,new,expected", [
    ("R", "a.onnx", "b.txt", ("deleted", "a.onnx", None)),  # stops being a model
    ("R", "a.txt", "b.onnx", ("added", None, "b.onnx")),
    ("R", "a.txt", "b.txt", None),
    ("C", "a.onnx", "b.onnx", ("added", None, "b.onnx")),
    ("T", "a.onnx", "a.onnx", ("type-changed", "a.onnx", "a.onnx")),
    ("M", "a.txt", "a.txt", None),
])
def test_classify(letter: str, old: str, new: str, expected: tuple | None) -> None:
    change = gitscan._classify(letter, old, new, is_onnx)
    assert (None if change is None else (change.status, change.base_path, change.head_path)) \
        == expected


def test_unmerged_path_is_refused() -> None:
    with pytest.raises(InputError, match="merge conflict"):
        gitscan._classify("U", "a.onnx", "a.onnx", is_onnx)


def test_lfs_pointer_detected_and_message_says_how_to_fetch() -> None:
    # Pointer layout from the Git LFS specification (docs/spec.md in the git-lfs repository).
    pointer = (b"version https://git-lfs.github.com/spec/v1\n"
               b"oid sha256:4d7a214614ab2935c943f9e0ff69d22eadbb8f32b1258daaa5e2ca24d17e2393\n"
               b"size 12345\n")
    assert gitscan.is_lfs_pointer(pointer)
    assert not gitscan.is_lfs_pointer(b"\x08\x07\x12\x04" + pointer)
    assert not gitscan.is_lfs_pointer(pointer + b"x" * 2000)
    message = gitscan.lfs_error_message("models/a.onnx", "head")
    assert "git lfs pull" in message and "lfs: true" in message


def test_unknown_ref_and_option_like_ref_are_clear_errors(repo: Repo) -> None:
    with pytest.raises(InputError, match="unknown git revision 'nope'.*fetch"):
        gitscan.merge_base("nope", repo.path)
    with pytest.raises(InputError, match="starts with '-'"):
        gitscan.merge_base("--output=/tmp/x", repo.path)


def test_unrelated_histories_explain_shallow_clones(repo: Repo) -> None:
    repo.git("checkout", "-q", "--orphan", "lonely")
    repo.write("x.onnx", b"x")
    repo.commit("orphan")
    with pytest.raises(InputError, match="fetch-depth: 0"):
        gitscan.merge_base("main", repo.path)


def test_outside_a_repository(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="inside a git repository"):
        gitscan.repo_root(tmp_path)


def test_write_blob_streams_and_flags_lfs_pointers(repo: Repo, tmp_path: Path) -> None:
    dest = tmp_path / "out.onnx"
    assert gitscan.write_blob("HEAD", "models/change.onnx", repo.path, dest)
    assert dest.read_bytes() == b"change-v2" * 50
    repo.write("models/lfs.onnx", b"version https://git-lfs.github.com/spec/v1\noid sha256:"
               + b"0" * 64 + b"\nsize 9\n")
    repo.commit("pointer")
    assert not gitscan.write_blob("HEAD", "models/lfs.onnx", repo.path, dest)
    with pytest.raises(InputError, match="reading models/none.onnx"):
        gitscan.write_blob("HEAD", "models/none.onnx", repo.path, dest)
