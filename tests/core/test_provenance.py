"""Provenance records: the git commit of a config's folder, tolerant of absent or slow git."""

import shutil
import subprocess

import pytest

from pairvel.core import provenance
from pairvel.core.provenance import git_commit


@pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")
def test_git_commit_of_a_work_tree_and_of_a_plain_folder(tmp_path):
    repo = tmp_path / "repo"
    (repo / "configs").mkdir(parents=True)
    (repo / "configs" / "run.toml").write_text("[run]\n")
    env = ["-c", "user.name=t", "-c", "user.email=t@example.invalid"]
    subprocess.run(["git", "init", "-q", str(repo)], check=True)
    subprocess.run(["git", "-C", str(repo), *env, "add", "."], check=True)
    subprocess.run(["git", "-C", str(repo), *env, "commit", "-qm", "first"], check=True)
    head = subprocess.run(["git", "-C", str(repo), "rev-parse", "HEAD"], capture_output=True, text=True,
                          check=True).stdout.strip()
    assert git_commit(repo / "configs") == head
    (tmp_path / "plain").mkdir()
    assert git_commit(tmp_path / "plain") is None
    assert git_commit(tmp_path / "missing") is None


@pytest.mark.parametrize("failure", [FileNotFoundError(2, "No such file", "git"),
                                     subprocess.TimeoutExpired(["git"], 5.0), PermissionError(13, "denied")])
def test_git_commit_is_none_when_git_cannot_answer(tmp_path, monkeypatch, failure):
    def broken(*args, **kwargs):
        raise failure

    monkeypatch.setattr(provenance.subprocess, "run", broken)
    assert git_commit(tmp_path) is None
