"""Git plumbing: changed models (renames, additions, deletions), hostile names, LFS, refs.

Clones are made the way CI systems make them (a bare origin; GitLab's shallow
single-branch clone; a fork's branch fetched from a second remote), and LFS tests
use the real git-lfs (pointer layout: the Git LFS specification, docs/spec.md in the
git-lfs repository).
"""

from __future__ import annotations

import os
import shlex
import shutil
import subprocess
from pathlib import Path

import pytest

from gate import gitscan
from gate.errors import InputError
from tests.gitkit import GIT_ENV, Repo

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


def test_parse_raw_diff_with_renames_copies_and_links() -> None:
    # `git diff --raw -z` layout (git-diff documentation, "Raw output format"): modes,
    # object names, status (with a similarity score for R and C), then the path(s).
    a, b, z = "a" * 40, "b" * 40, "0" * 40
    raw = (f":100644 100644 {a} {b} M\0a b.onnx\0"
           f":100644 100644 {a} {b} R087\0old.onnx\0new.onnx\0"
           f":100644 100644 {a} {a} C100\0src.onnx\0copy.onnx\0"
           f":100644 000000 {a} {z} D\0-x.onnx\0"
           f":000000 120000 {z} {b} A\0y\0"
           f":120000 100644 {a} {b} T\0was-link.onnx\0").encode()
    none: frozenset[str] = frozenset()
    parsed = gitscan.parse_raw_diff(raw)
    assert [(e.letter, e.base_path, e.head_path, e.links) for e in parsed] == [
        ("M", "a b.onnx", "a b.onnx", none), ("R", "old.onnx", "new.onnx", none),
        ("C", "src.onnx", "copy.onnx", none), ("D", "-x.onnx", None, none),
        ("A", None, "y", frozenset({"head"})), ("T", "was-link.onnx", "was-link.onnx",
                                                 frozenset({"base"})),
    ]
    assert (parsed[1].base_object, parsed[1].head_object) == (a, b)
    assert (parsed[4].base_mode, parsed[4].head_mode) == ("000000", "120000")


@pytest.mark.parametrize("letter,old,new,expected", [
    ("R", "a.onnx", "b.txt", ("renamed", "a.onnx", "b.txt")),  # leaves the globs: still judged
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


# --- fetch hints that work (bare origin, shallow single-branch clone) --------------------

def clone(origin: Path, dest: Path, *args: str) -> Repo:
    """A clone of ``origin`` made the way CI systems make them (``args``: depth, branch)."""
    subprocess.run(["git", "clone", "-q", *args, origin.as_uri(), str(dest)], check=True,
                   capture_output=True, env={**os.environ, **GIT_ENV})
    cloned = Repo.__new__(Repo)
    cloned.path = dest
    return cloned


@pytest.fixture()
def origin(tmp_path: Path) -> Path:
    """A bare origin with main (three commits) and a pull-request branch cut from it."""
    work = Repo(tmp_path / "work")
    for k in range(3):
        work.write("models/m.onnx", f"model v{k}".encode() * 20)
        work.commit(f"main {k}")
    work.branch("pr")
    work.write("models/m.onnx", b"changed by the pr" * 20)
    work.commit("pr")
    bare = tmp_path / "origin.git"
    subprocess.run(["git", "clone", "-q", "--bare", str(work.path), str(bare)], check=True,
                   capture_output=True, env={**os.environ, **GIT_ENV})
    return bare


def run_hint(repo: Repo, hint: str) -> None:
    """Run the git command a hint names, exactly as printed (up to the first parenthesis)."""
    command = hint.split(" (")[0].split(", then")[0]
    assert command.startswith("git fetch ")
    repo.git(*shlex.split(command)[1:])


def test_single_branch_shallow_clone_hint_fetches_a_usable_base(origin: Path,
                                                                tmp_path: Path) -> None:
    # The GitLab default: a shallow clone of the pull request's branch only. `git fetch origin
    # main` there updates FETCH_HEAD but not origin/main; the printed command must fix it.
    pr = clone(origin, tmp_path / "gl", "--depth", "20", "--single-branch", "--branch", "pr")
    pr.git("fetch", "-q", "origin", "main")
    with pytest.raises(InputError) as caught:
        gitscan.merge_base("origin/main", pr.path)
    message = caught.value.format_message()
    assert "git fetch origin origin/main" not in message  # the old hint, which fails
    hint = message.split("fetch it first: ")[1]
    run_hint(pr, hint)
    base = gitscan.merge_base("origin/main", pr.path)
    assert base == pr.git("rev-parse", "origin/main").strip()
    # The merge-request diff base SHA (what GitLab hands the job) works as --base too.
    assert gitscan.merge_base(base, pr.path) == base


def test_hint_for_a_plain_branch_name_and_for_a_commit(origin: Path, tmp_path: Path) -> None:
    pr = clone(origin, tmp_path / "c", "--single-branch", "--branch", "pr")
    with pytest.raises(InputError, match=r"git fetch origin main:refs/remotes/origin/main, "
                                         r"then --base origin/main"):
        gitscan.merge_base("main", pr.path)
    with pytest.raises(InputError, match="git fetch origin 0123456789ab "):
        gitscan.merge_base("0123456789ab", pr.path)


def test_hint_without_a_usable_remote_names_the_problem_not_a_command_that_fails(
        origin: Path, tmp_path: Path) -> None:
    """A clone with no remote, or whose remote is not called what the ref says, was told
    to run ``git fetch origin origin/main:refs/remotes/origin/origin/main``: a command
    that fails, naming a remote that does not exist."""
    local = Repo(tmp_path / "local")  # no remote at all
    local.write("models/m.onnx", b"model" * 20)
    local.commit("main")
    with pytest.raises(InputError) as caught:
        gitscan.merge_base("origin/main", local.path)
    message = caught.value.format_message()
    assert "this repository has no remote" in message and "git fetch" not in message
    assert "git branch -a" in message
    # The remote is called upstream: the ref's 'origin' is named as missing, and the
    # command offered fetches from the remote there is.
    other = clone(origin, tmp_path / "up", "--origin", "upstream", "--single-branch",
                  "--branch", "pr")
    with pytest.raises(InputError) as caught:
        gitscan.merge_base("origin/main", other.path)
    message = caught.value.format_message()
    assert "there is no remote named 'origin' (remotes: upstream)" in message, message
    assert "git fetch upstream " in message and "git fetch origin" not in message


def test_a_mistyped_base_gets_a_did_you_mean_from_the_local_branches(
        origin: Path, tmp_path: Path) -> None:
    pr = clone(origin, tmp_path / "full")  # every branch: origin/main, origin/pr
    with pytest.raises(InputError, match=r"unknown git revision 'orgin/main' \(did you mean "
                                         r"'origin/main'\?\)"):
        gitscan.merge_base("orgin/main", pr.path)
    assert gitscan.merge_base("origin/main", pr.path)  # the control: the right name resolves


def test_fork_like_branch_from_another_remote(origin: Path, tmp_path: Path) -> None:
    # A fork's pull request: the head comes from a second remote, the base from origin.
    fork = clone(origin, tmp_path / "fork", "--branch", "pr")
    fork.write("models/m.onnx", b"fork change" * 20)
    fork.commit("fork")
    upstream = clone(origin, tmp_path / "upstream", "--branch", "main")
    upstream.git("fetch", "-q", str(fork.path), "pr:fork-pr")
    upstream.git("checkout", "-q", "fork-pr")
    base = gitscan.merge_base("origin/main", upstream.path)
    changes = gitscan.changed_models(base, upstream.path, is_onnx)
    assert [(c.status, c.path) for c in changes] == [("modified", "models/m.onnx")]
    assert gitscan.read_blob(base, "models/m.onnx", upstream.path) == b"model v2" * 20


# --- Git LFS: each side read with its own commit's attributes ----------------------------

needs_lfs = pytest.mark.skipif(
    subprocess.run(["git", "lfs", "version"], capture_output=True, check=False).returncode != 0,
    reason="git-lfs is not installed (apt-get install git-lfs; .ci/run installs it in CI)")

MODEL_A = b"\x08\x07real model bytes A" * 40
MODEL_B = b"\x08\x07real model bytes B" * 40


def lfs_repo(path: Path) -> Repo:
    repo = Repo(path)
    repo.git("lfs", "install", "--local", "--skip-repo")  # filters, no hooks
    return repo


@needs_lfs
def test_models_moved_into_lfs_read_real_on_both_sides(tmp_path: Path) -> None:
    repo = lfs_repo(tmp_path / "in")
    repo.write("models/a.onnx", MODEL_A)
    base = repo.commit("plain model")
    repo.branch("pr")
    # a nested .gitattributes (models/ only) moves the folder into LFS
    repo.write("models/.gitattributes", "*.onnx filter=lfs diff=lfs merge=lfs -text\n")
    repo.git("add", "models/.gitattributes")
    repo.git("rm", "-q", "--cached", "models/a.onnx")
    repo.write("models/a.onnx", MODEL_B)
    repo.commit("into lfs")
    assert gitscan.is_lfs_pointer(repo.git("cat-file", "blob", "HEAD:models/a.onnx").encode())
    assert gitscan.filter_at("HEAD", "models/a.onnx", repo.path) == "lfs"
    assert gitscan.filter_at(base, "models/a.onnx", repo.path) is None
    assert gitscan.read_blob(base, "models/a.onnx", repo.path) == MODEL_A
    assert gitscan.read_blob("HEAD", "models/a.onnx", repo.path) == MODEL_B


@needs_lfs
def test_models_moved_out_of_lfs_resolve_the_base_pointer(tmp_path: Path) -> None:
    repo = lfs_repo(tmp_path / "out")
    repo.write(".gitattributes", "*.onnx filter=lfs diff=lfs merge=lfs -text\n")
    repo.write("models/a.onnx", MODEL_A)
    base = repo.commit("model in lfs")
    repo.branch("pr")
    (repo.path / ".gitattributes").unlink()  # HEAD's working tree no longer tracks *.onnx
    repo.git("rm", "-q", "--cached", "models/a.onnx")
    repo.write("models/a.onnx", MODEL_B)
    repo.commit("out of lfs")
    assert gitscan.is_lfs_pointer(repo.git("cat-file", "blob", f"{base}:models/a.onnx").encode())
    assert gitscan.filter_at(base, "models/a.onnx", repo.path) == "lfs"
    assert gitscan.read_blob(base, "models/a.onnx", repo.path) == MODEL_A
    assert gitscan.read_blob("HEAD", "models/a.onnx", repo.path) == MODEL_B


@needs_lfs
def test_missing_lfs_object_stays_a_pointer_with_a_fetch_hint(tmp_path: Path) -> None:
    repo = lfs_repo(tmp_path / "gone")
    repo.write(".gitattributes", "*.onnx filter=lfs -text\n")
    repo.write("models/a.onnx", MODEL_A)
    base = repo.commit("model in lfs")
    shutil.rmtree(repo.path / ".git" / "lfs" / "objects")  # as after a clone without LFS
    assert not gitscan.write_blob(base, "models/a.onnx", repo.path, tmp_path / "x.onnx")
    message = gitscan.lfs_error_message("models/a.onnx", "base", base)
    assert f"git lfs fetch origin {base}" in message and "install git-lfs" in message


def test_a_pointer_the_commit_does_not_track_with_lfs_is_not_smudged(repo: Repo,
                                                                     tmp_path: Path) -> None:
    pointer = (b"version https://git-lfs.github.com/spec/v1\noid sha256:" + b"1" * 64
               + b"\nsize 9\n")
    repo.write("models/fake.onnx", pointer)
    repo.commit("pointer text without lfs attributes")
    assert gitscan.filter_at("HEAD", "models/fake.onnx", repo.path) is None
    assert not gitscan.write_blob("HEAD", "models/fake.onnx", repo.path, tmp_path / "f.onnx")
    assert (tmp_path / "f.onnx").read_bytes() == pointer


# --- one `git cat-file --batch` process for every blob of a run -----------------------

def _count_batch_processes(monkeypatch: pytest.MonkeyPatch) -> list[list[str]]:
    started: list[list[str]] = []
    real = subprocess.Popen

    def counting(args, *rest, **kwargs):  # type: ignore[no-untyped-def]
        if "cat-file" in args:
            started.append(list(args))
        return real(args, *rest, **kwargs)

    monkeypatch.setattr(gitscan.subprocess, "Popen", counting)
    return started


def test_blob_reader_reads_every_blob_through_one_git_process(
        repo: Repo, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    base = gitscan.merge_base("main", repo.path)
    repo.write("models/change.onnx", b"change-v3-staged" * 50)
    repo.git("add", "models/change.onnx")
    repo.write("models/change.onnx", b"change-v4-working-tree" * 50)
    started = _count_batch_processes(monkeypatch)
    reader = gitscan.BlobReader(repo.path)
    try:
        for _ in range(3):
            assert reader.read(base, "models/change.onnx", tmp_path / "s") == b"change-v1" * 50
            assert reader.read("HEAD", "models/change.onnx", tmp_path / "s") == b"change-v2" * 50
            assert reader.read(gitscan.STAGED, "models/change.onnx",
                               tmp_path / "s") == b"change-v3-staged" * 50
            assert reader.read("HEAD", "models/moved/here.onnx",
                               tmp_path / "s") == b"move-me-unchanged" * 50
        with pytest.raises(InputError, match="reading models/nope.onnx at HEAD"):
            reader.read("HEAD", "models/nope.onnx", tmp_path / "s")
        assert reader.read("HEAD", "models/added.onnx", tmp_path / "s") == b"brand new" * 50
    finally:
        reader.close()
    assert [a[-2:] for a in started] == [["cat-file", "--batch"]] * 2  # one, restarted once
    assert not (tmp_path / "s").exists()  # nothing copied to a file on the way


def test_blob_reader_streams_a_large_blob_to_a_file(repo: Repo, tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(gitscan, "SPILL_BYTES", 100)
    reader = gitscan.BlobReader(repo.path)
    try:
        got = reader.read("HEAD", "models/change.onnx", tmp_path / "big")
        small = reader.read("HEAD", "README.md", tmp_path / "small")
    finally:
        reader.close()
    assert got == tmp_path / "big" and got.read_bytes() == b"change-v2" * 50
    assert small == b"changed\n"


def test_blob_reader_reads_names_the_batch_protocol_cannot_carry(tmp_path: Path) -> None:
    repo = Repo(tmp_path / "nl")
    for k, name in enumerate(HOSTILE):
        repo.write(name, f"model {k}".encode() * 20)
    repo.commit("hostile")
    reader = gitscan.BlobReader(repo.path)
    try:
        for k, name in enumerate(HOSTILE):
            assert reader.read("HEAD", name, tmp_path / "s") == f"model {k}".encode() * 20
    finally:
        reader.close()
