"""Output folders lose nothing: one command per path, --force only over pairvel's own unchanged files,
plain run names, SIGTERM and SIGKILL, the user's umask, and every refusal before the work.

Each refusal is checked the same way: exit code 2, exactly one stderr line naming the thing at fault,
the folder holding the inputs and the intended output has the same entries as before (no output
folder, no hidden partial folder, no key file), and every input's sha256 is unchanged.
"""

import hashlib
import json
import os
import signal
import socket
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

import pairvel
import pairvel.pipeline
from pairvel.cli import _run_name, main
from pairvel.core.errors import ConfigError, OutputError
from pairvel.input.config import config_from_dict
from pairvel.report.folders import CLAIM_FILE, MANIFEST_FILE, OUTPUT_MARKER, claim_output_dir, read_manifest, write_folder_atomically

ROOT = Path(pairvel.__file__).resolve().parents[1]


# --- helpers ----------------------------------------------------------------------------------------

def snapshot(folder: Path) -> dict:
    """{relative name: sha256} of every file below ``folder`` (hidden ones too), and the folders as None."""
    out = {}
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        out[rel] = hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else None
    return out


def argv_run(folder: Path, *extra, out="out"):
    return ["run", str(folder / "run.toml"), "--out", str(folder / out), "--quiet", *extra]


def refused(capsys, code, folder: Path, before: dict, *parts, after_work=False):
    """Exit code 2, one stderr line holding every one of ``parts``, and ``folder`` exactly as ``before``.

    ``after_work``: the run's own warnings (``pairvel: warning: ...``) came before the error line.
    """
    err = capsys.readouterr().err.strip().splitlines()
    if after_work:
        err = [line for line in err if not line.startswith("pairvel: warning: ")]
    assert code == 2, err
    assert len(err) == 1 and err[0].startswith("pairvel: error: "), err
    for part in parts:
        assert str(part) in err[0], (part, err[0])
    assert snapshot(folder) == before
    return err[0]


def no_pipeline(monkeypatch):
    """Make the measurement itself fail loudly: a refusal must come before it."""
    def must_not_run(*args, **kwargs):
        raise AssertionError("run_pipeline must not start")
    monkeypatch.setattr(pairvel.pipeline, "run_pipeline", must_not_run)


def earlier_output(out: Path, files=None) -> Path:
    """A folder written by pairvel (marker and manifest), without running the pipeline."""
    files = files or {"summary.json": "{}\n", "report.md": "# report\n", "tables/extra.ecsv": "1\n"}

    def fill(tmp):
        for name, text in files.items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            (tmp / name).write_text(text)
    return write_folder_atomically(out, fill)


def dead_pid() -> int:
    """The process id of a process that has finished (and been reaped)."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def claim_record(pid, *, role, host=None, created=True, process_start=None):
    return {"kind": "pairvel output claim", "role": role, "token": "t", "created": created, "pid": pid,
            "host": host or socket.gethostname(), "process_start": process_start,
            "started_utc": "2026-01-01T00:00:00+00:00", "command": "pairvel run x.toml"}


def start_slow_run(folder: Path, out: Path) -> subprocess.Popen:
    """``pairvel run`` in a subprocess (slow.toml: many shuffled nulls); returns once it holds ``out``."""
    cfg = folder / "slow.toml"
    cfg.write_text((folder / "run.toml").read_text().replace("n_random = 2", "n_random = 2\nn_shuffle = 2000"))
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen([sys.executable, "-m", "pairvel.cli", "run", str(cfg), "--out", str(out), "--quiet"],
                            cwd=folder, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    while not (list(folder.glob(".out.partial-*")) and (out / CLAIM_FILE).is_file()):
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            raise AssertionError(f"the run never claimed {out}: {proc.communicate()}")
        time.sleep(0.05)
    return proc


# --- 1. one command per output path -------------------------------------------------------------------

def test_a_claimed_path_is_refused_at_once(tiny_survey, capsys, monkeypatch):
    out = tiny_survey / "out"
    with claim_output_dir(out) as other:  # another command holds the path
        no_pipeline(monkeypatch)
        before = snapshot(tiny_survey)
        for extra in ((), ("--force",)):
            line = refused(capsys, main(argv_run(tiny_survey, *extra)), tiny_survey, before, out,
                           "claimed by another pairvel command", f"pid {os.getpid()}", out / CLAIM_FILE)
        assert (out / CLAIM_FILE).is_file() and other.path == out
    assert "wait for it to finish" in line
    assert sorted(p.name for p in tiny_survey.iterdir()) == ["cat.csv", "map.fits", "run.toml"]


def test_nothing_that_appears_during_a_run_is_lost(tiny_survey, capsys, monkeypatch):
    """The path is the run's from the start: a user's mkdir fails, a second claim fails, and a file
    dropped into the claimed folder is kept (beside the output, named in a warning)."""
    out = tiny_survey / "out"
    real = pairvel.pipeline.run_pipeline
    seen = {}

    def meanwhile(cfg, **kwargs):
        with pytest.raises(FileExistsError):
            os.mkdir(out)
        with pytest.raises(OutputError, match="claimed by another pairvel command") as exc:
            claim_output_dir(out)
        seen["second"] = str(exc.value)
        (out / "notes.txt").write_text("a user's note")
        return real(cfg, **kwargs)

    monkeypatch.setattr(pairvel.pipeline, "run_pipeline", meanwhile)
    inputs = {name: snapshot(tiny_survey)[name] for name in ("cat.csv", "map.fits", "run.toml")}
    assert main(argv_run(tiny_survey)) == 0
    warned = [line for line in capsys.readouterr().err.splitlines() if "files added to it during the run" in line]
    assert len(warned) == 1 and warned[0].startswith(f"pairvel: warning: output folder {out}: "), warned
    assert str(out) in seen["second"]
    kept = [p for p in tiny_survey.iterdir() if p.name.startswith("out.replaced-")]
    assert len(kept) == 1 and [p.name for p in kept[0].iterdir()] == ["notes.txt"]
    assert (kept[0] / "notes.txt").read_text() == "a user's note"
    assert (out / "summary.json").is_file() and not (out / CLAIM_FILE).exists()
    assert not [p for p in tiny_survey.iterdir() if p.name.startswith(".")]
    assert {name: snapshot(tiny_survey)[name] for name in inputs} == inputs


# --- 2. --force replaces only pairvel's own, unchanged files --------------------------------------------

@pytest.mark.parametrize("change, named", [
    (lambda out: (out / "notes.txt").write_text("mine"), "notes.txt (not written by pairvel)"),
    (lambda out: (out / "report.md").write_text("# my edits\n"), "report.md (changed since pairvel wrote it)"),
    (lambda out: (out / "tables" / "more").mkdir(), "tables/more (not written by pairvel)"),
    (lambda out: (out / "link").symlink_to(out / "report.md"), "link (not written by pairvel)"),
    (lambda out: (out / MANIFEST_FILE).unlink(), "older pairvel without a list of its files"),
])
def test_force_refuses_a_folder_holding_anything_else(tiny_survey, capsys, monkeypatch, change, named):
    out = earlier_output(tiny_survey / "out")
    change(out)
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    refused(capsys, main(argv_run(tiny_survey, "--force")), tiny_survey, before, out, named)


@pytest.mark.parametrize("where", ["config", "catalogue", "mask"])
def test_force_refuses_a_folder_holding_an_input(tiny_survey, capsys, monkeypatch, where):
    out = earlier_output(tiny_survey / "out")
    cfg = (tiny_survey / "run.toml").read_text()
    cfg = cfg.replace('path = "cat.csv"', f'path = "{tiny_survey / "cat.csv"}"')
    cfg = cfg.replace('path = "map.fits"', f'path = "{tiny_survey / "map.fits"}"')
    config, label = tiny_survey / "run.toml", "the config file"
    if where == "config":
        config = out / "run.toml"
    elif where == "catalogue":
        os.replace(tiny_survey / "cat.csv", out / "cat.csv")
        cfg, label = cfg.replace(str(tiny_survey / "cat.csv"), str(out / "cat.csv")), "catalogue.path"
    else:
        (out / "mask.fits").write_bytes(b"a mask")
        cfg, label = cfg.replace("[aperture]", f'mask_path = "{out / "mask.fits"}"\n\n[aperture]'), "map.mask_path"
    config.write_text(cfg)
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    code = main(["run", str(config), "--out", str(out), "--force", "--quiet"])
    refused(capsys, code, tiny_survey, before, out, f"must not hold an input of the run; it holds {label}")


def test_force_refuses_the_working_folder(tiny_survey, capsys, monkeypatch):
    out = earlier_output(tiny_survey / "out")
    monkeypatch.chdir(out)
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    refused(capsys, main(argv_run(tiny_survey, "--force")), tiny_survey, before, "must not hold the working folder")


def test_force_replaces_an_unchanged_output_and_leaves_nothing_else(tiny_survey):
    out = earlier_output(tiny_survey / "out", {"old.txt": "old\n", "sub/old.ecsv": "1\n"})
    assert main(argv_run(tiny_survey, "--force")) == 0
    manifest = read_manifest(out)
    assert "summary.json" in manifest and "old.txt" not in manifest and not (out / "old.txt").exists()
    for name, entry in manifest.items():  # the manifest describes what is there
        assert hashlib.sha256((out / name).read_bytes()).hexdigest() == entry["sha256"]
    assert sorted(p.name for p in tiny_survey.iterdir()) == ["cat.csv", "map.fits", "out", "run.toml"]


# --- 3. run.name is a plain folder name ------------------------------------------------------------------

@pytest.mark.parametrize("name", ["..", ".", "", "a/b", "/tmp", "a\\\\b", "a\\u0000b"])
def test_run_name_must_be_a_plain_folder_name(tiny_survey, capsys, monkeypatch, name):
    work = tiny_survey / "work"
    work.mkdir()
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace('name = "tiny"', f'name = "{name}"'))
    monkeypatch.chdir(work)  # "." would be work, ".." the survey folder
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    for extra in ((), ("--force",)):
        code = main(["run", str(cfg), "--quiet", *extra])
        refused(capsys, code, tiny_survey, before, "'run.name' must be a plain folder name", "run.toml")
    assert _run_name(cfg) == "pairvel-run"  # the lenient early read agrees with the check


def test_run_name_check_in_the_config():
    base = {"catalogue": {"path": "c.csv"}, "map": {"path": "m.fits"}, "theory": {"bias": 1.0}}
    with pytest.raises(ConfigError, match="'run.name' must be a plain folder name") as exc:
        config_from_dict({**base, "run": {"name": ".."}})
    assert exc.value.key == "run.name"
    assert config_from_dict({**base, "run": {"name": "tiny.v2 (test)"}}).run.name == "tiny.v2 (test)"


# --- 4. SIGTERM, SIGKILL and what dead runs leave -----------------------------------------------------------

def test_sigterm_leaves_nothing_and_a_running_claim_refuses_a_second_run(tiny_survey, capsys):
    out = tiny_survey / "out"
    proc = start_slow_run(tiny_survey, out)
    try:
        before = snapshot(tiny_survey)
        refused(capsys, main(argv_run(tiny_survey)), tiny_survey, before, "claimed by another pairvel command",
                f"pid {proc.pid}")
        inputs = {name: before[name] for name in ("cat.csv", "map.fits", "run.toml", "slow.toml")}
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=300)
    finally:
        proc.kill()
    assert proc.returncode == 143
    lines = [line for line in err.splitlines() if not line.startswith("pairvel: warning: ")]
    assert lines == ["pairvel: terminated; no output written"], err
    assert snapshot(tiny_survey) == inputs  # no output, no hidden folder, inputs unchanged


def test_sigkill_leftovers_are_removed_by_the_next_run(tiny_survey, capsys):
    out = tiny_survey / "out"
    proc = start_slow_run(tiny_survey, out)
    proc.kill()
    proc.communicate(timeout=60)
    assert (out / CLAIM_FILE).is_file() and list(tiny_survey.glob(".out.partial-*"))  # what SIGKILL leaves
    assert main(argv_run(tiny_survey)) == 0
    assert (out / OUTPUT_MARKER).is_file() and not (out / CLAIM_FILE).exists()
    assert not [p.name for p in tiny_survey.iterdir() if p.name.startswith(".")]


def test_only_claims_of_dead_processes_on_this_host_are_removed(tmp_path):
    out = tmp_path / "out"
    pid = dead_pid()
    hidden = {"dead": (pid, None, None), "live": (os.getpid(), None, None),
              "other host": (pid, "elsewhere.invalid", None),
              "pid reused": (os.getpid(), None, "1")}  # our pid, but a process started at another time
    for label, (p, host, start) in hidden.items():
        folder = tmp_path / f".out.partial-{label.replace(' ', '_')}"
        folder.mkdir()
        (folder / "half.ecsv").write_text("x")
        (folder / CLAIM_FILE).write_text(json.dumps(claim_record(p, role="work", host=host, process_start=start)))
    (tmp_path / ".out.partial-nomarker").mkdir()
    (tmp_path / ".out.partial-nomarker" / "keep.txt").write_text("not pairvel's")
    out.mkdir()
    (out / CLAIM_FILE).write_text(json.dumps(claim_record(pid, role="target")))
    with claim_output_dir(out) as claim:  # the dead target claim is gone, the path is ours
        assert claim.path == out
    assert sorted(p.name for p in tmp_path.iterdir()) == [".out.partial-live", ".out.partial-nomarker",
                                                          ".out.partial-other_host"]
    (out).mkdir()
    (out / CLAIM_FILE).write_text(json.dumps(claim_record(os.getpid(), role="target")))
    with pytest.raises(OutputError, match=f"claimed by another pairvel command \\(by pid {os.getpid()}"):
        claim_output_dir(out)
    (out / CLAIM_FILE).write_text("{ half a record")
    with pytest.raises(OutputError, match="cannot be read: being written, or left by a crash; delete it if no pairvel command"):
        claim_output_dir(out)
    assert (out / CLAIM_FILE).read_text() == "{ half a record"


@pytest.mark.parametrize("one_step", [True, False])
def test_force_swap_with_and_without_the_one_step_exchange(tmp_path, monkeypatch, one_step):
    import pairvel.report.folders as folders

    if not one_step:  # a system without renameat2: two renames
        monkeypatch.setattr(folders, "_exchange", lambda a, b: False)
    out = earlier_output(tmp_path / "out", {"a.txt": "old a\n", "sub/b.txt": "old b\n"})
    write_folder_atomically(out, lambda tmp: (tmp / "a.txt").write_text("new a\n"), force=True)
    assert snapshot(out) == {"a.txt": hashlib.sha256(b"new a\n").hexdigest(), MANIFEST_FILE: snapshot(out)[MANIFEST_FILE],
                             OUTPUT_MARKER: hashlib.sha256(b"written by pairvel\n").hexdigest()}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_a_dead_force_run_leaves_the_earlier_output_intact(tmp_path):
    """Killed after claiming an earlier output: the next command removes the claim file alone."""
    out = earlier_output(tmp_path / "out")
    before = snapshot(out)
    (out / CLAIM_FILE).write_text(json.dumps(claim_record(dead_pid(), role="target", created=False)))
    with pytest.raises(OutputError, match="exists already"):
        claim_output_dir(out)
    assert snapshot(out) == before


# --- 5. the user's umask; the blinding key stays private ---------------------------------------------------------

@pytest.mark.parametrize("umask", [0o022, 0o027])
def test_outputs_follow_the_umask_and_the_key_is_private(tiny_survey, capsys, umask):
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text() + "\n[blinding]\nenabled = true\n")
    saved = os.umask(umask)
    try:
        assert main(argv_run(tiny_survey)) == 0
        assert main(["unblind", str(tiny_survey / "out"), "--key", str(tiny_survey / "out.blinding-key.json"),
                     "--quiet"]) == 0
    finally:
        os.umask(saved)
    for folder in (tiny_survey / "out", tiny_survey / "out-unblinded"):
        assert stat.S_IMODE(folder.stat().st_mode) == 0o777 & ~umask
        for path in folder.rglob("*"):
            assert stat.S_IMODE(path.stat().st_mode) == (0o777 if path.is_dir() else 0o666) & ~umask, path
    assert stat.S_IMODE((tiny_survey / "out.blinding-key.json").stat().st_mode) == 0o600


# --- 6. refusals before the work ---------------------------------------------------------------------------------

def test_unwritable_output_parent_is_refused_before_the_work(tiny_survey, capsys, monkeypatch):
    (tiny_survey / "file").write_text("a file, not a folder")
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    refused(capsys, main(argv_run(tiny_survey, out="file/out")), tiny_survey, before, "parent folder",
            "is not a folder")
    refused(capsys, main(argv_run(tiny_survey, out="none/out")), tiny_survey, before, "does not exist")

    real_mkdir = os.mkdir

    def mkdir(path, *args, **kwargs):  # root may write anywhere: make the file system say no instead
        if Path(path).name == "out":
            raise PermissionError(13, "Permission denied")
        return real_mkdir(path, *args, **kwargs)

    monkeypatch.setattr(os, "mkdir", mkdir)
    refused(capsys, main(argv_run(tiny_survey)), tiny_survey, before, tiny_survey / "out",
            "cannot be created (Permission denied)")


def test_no_room_beside_the_output_releases_the_claim(tiny_survey, capsys, monkeypatch):
    real_mkdir = os.mkdir

    def mkdir(path, *args, **kwargs):
        if Path(path).name.startswith(".out.partial-"):
            raise PermissionError(13, "Permission denied")
        return real_mkdir(path, *args, **kwargs)

    monkeypatch.setattr(os, "mkdir", mkdir)
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    refused(capsys, main(argv_run(tiny_survey)), tiny_survey, before, "cannot write beside it", "Permission denied")


@pytest.mark.parametrize("key_line, named", [
    ('key_path = "file/key.json"', "is not a folder"),
    ('key_path = "missing/key.json"', "does not exist"),
    ('key_path = "out/key.json"', "holds blinding.key_path"),
    ('key_path = "bad.json"', "not a pairvel blinding key"),
    ('key_path = "file"', "cannot be read as JSON"),
])
def test_blinding_key_path_is_checked_before_the_work(tiny_survey, capsys, monkeypatch, key_line, named):
    (tiny_survey / "file").write_text("a file, not a folder")
    (tiny_survey / "bad.json").write_text('{"kind": "something else"}')
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text() + f"\n[blinding]\nenabled = true\n{key_line}\n")
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    refused(capsys, main(argv_run(tiny_survey)), tiny_survey, before, "blinding", named)


def test_unwritable_key_folder_is_refused(tiny_survey, capsys, monkeypatch):
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text() + "\n[blinding]\nenabled = true\n")
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda path, mode, **kw: False if Path(path) == tiny_survey
                        else real_access(path, mode, **kw))
    no_pipeline(monkeypatch)
    before = snapshot(tiny_survey)
    refused(capsys, main(argv_run(tiny_survey)), tiny_survey, before, "out.blinding-key.json", "is not writable")


def test_a_failure_after_the_key_was_made_leaves_nothing(tiny_survey, capsys, monkeypatch):
    import pairvel.report.outputs as outputs

    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text() + "\n[blinding]\nenabled = true\n")
    before = snapshot(tiny_survey)

    def full_disk(result, summary):
        assert (tiny_survey / "out.blinding-key.json").is_file()  # the key was written, then the outputs failed
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(outputs, "_report", full_disk)
    refused(capsys, main(argv_run(tiny_survey)), tiny_survey, before, "cannot be written", "No space left",
            after_work=True)


# --- the other commands that write folders ------------------------------------------------------------------------

def test_validate_and_mock_claim_their_folder_first(tmp_path, capsys):
    from pairvel.sims.mock import make_mock_survey

    out = tmp_path / "val"
    with claim_output_dir(out):
        before = snapshot(tmp_path)
        refused(capsys, main(["validate", str(out), "--n-mocks", "2", "--quiet"]), tmp_path, before,
                "claimed by another pairvel command")
        with pytest.raises(OutputError, match="claimed by another pairvel command"):
            make_mock_survey(out, n_tracers=100, nside=64)
        assert snapshot(tmp_path) == before
    assert list(tmp_path.iterdir()) == []
