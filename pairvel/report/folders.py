"""Output folders that lose nothing: claimed at the start, filled aside, swapped in at the end.

Every command that writes a folder (run, demo, validate, unblind, mock) goes through
:func:`claim_output_dir` and :meth:`OutputClaim.write`; :func:`write_folder_atomically` does both
for a caller that holds no claim.

Claim
    Before any heavy work the output path is claimed.  A new path is claimed by ``os.mkdir`` of the
    target itself: of two runs (or a run and a user) creating it, exactly one succeeds, so nothing
    can appear at the path while the run works.  An existing folder that may be replaced (with
    ``force``: an earlier pairvel output, see below; for the mock: an empty folder) is claimed by
    creating ``.pairvel-claim`` in it with ``O_CREAT | O_EXCL``.  Either way the target then holds
    the claim file, a JSON record of the process (pid, host, the process's start time, UTC start,
    command line); a second command into the same path fails at once with one line naming the path
    and that record.  The claim also creates the hidden work folder ``.<name>.partial-<token>``
    beside the target (with its own claim record), so a missing or unwritable parent folder is
    found before the work, not after it.

Write
    The outputs go into the work folder, then ``run.log``, the manifest ``.pairvel-manifest.json``
    (relative name, size and sha256 of every file) and last the marker ``.pairvel-output``.  The
    work folder and the claimed target are then exchanged in one step (Linux ``renameat2`` with
    ``RENAME_EXCHANGE``; where that is missing, two renames), with SIGINT and SIGTERM held back
    until the exchange and its bookkeeping are done.  What was swapped out is the claimed target:
    empty, or the earlier output being replaced.  From it pairvel deletes its own files and those of
    its manifest that are unchanged; if anything else is left (a file added during the run) the
    folder is kept, renamed to ``<name>.replaced-<UTC time>`` beside the output, and a
    :class:`~pairvel.core.errors.PairvelWarning` names it.

Release
    On any failure or interruption (an exception, Ctrl-C, SIGTERM turned into an exception by the
    command line) the work folder is removed, the claim file deleted and a target this command
    created removed again, as are files outside the folder registered with
    :meth:`OutputClaim.remove_on_failure` (a blinding key made by this run).

Stale claims
    SIGKILL (or a crash of the machine) cannot be caught.  The next claim on the same path removes
    what a dead run left, and only that: a claim file, and hidden ``.<name>.partial-*`` folders that
    hold one, whose process ran on this host and no longer runs (no such pid, a zombie, or a pid now
    used by a process started at another time).  A live claim, a claim made on another host, an
    unreadable claim and a hidden folder without a claim record are never touched.

Replacing (``force``)
    Only a folder carrying the marker and a manifest, holding nothing but the manifest's files,
    each unchanged (size and sha256), and neither the working folder nor any path the caller
    protects (the config file and every path it names).  Folders written before manifests existed
    (marker, no manifest) are refused: their own files cannot be told from a user's.
"""

from __future__ import annotations

__all__ = ["CLAIM_FILE", "MANIFEST_FILE", "OUTPUT_MARKER", "RUN_LOG", "OutputClaim", "claim_output_dir",
           "prepare_output_dir", "read_manifest", "write_folder_atomically"]

import contextlib
import ctypes
import datetime as _dt
import errno
import json
import logging
import os
import secrets
import shlex
import shutil
import signal
import socket
import sys
import threading
import warnings
from pathlib import Path

from ..core.errors import OutputError, PairvelWarning
from ..core.provenance import file_sha256

#: Empty file that marks a folder as a complete pairvel output (written last).
OUTPUT_MARKER = ".pairvel-output"

#: name, size and sha256 of every file a run wrote into its folder.
MANIFEST_FILE = ".pairvel-manifest.json"

#: JSON record of the process that owns a folder now (the claimed target and its work folder).
CLAIM_FILE = ".pairvel-claim"

#: The run's log inside an output folder (written only when a ``run_log`` is given).
RUN_LOG = "run.log"

_OWN_FILES = (CLAIM_FILE, MANIFEST_FILE, OUTPUT_MARKER)
_CLAIM_KIND = "pairvel output claim"
_MANIFEST_KIND = "pairvel output manifest"

_log = logging.getLogger(__name__)


# --- the claim record and whether its process still runs --------------------------------------

def _proc_stat(pid: int):
    """(state letter, start time in clock ticks since boot) of ``pid`` from /proc, or None."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text.rpartition(")")[2].split()
    return (fields[0], fields[19]) if len(fields) > 19 else None


def _claim_record(role: str, token: str, *, created: bool) -> dict:
    stat = _proc_stat(os.getpid())
    return {"kind": _CLAIM_KIND, "role": role, "token": token, "created": created, "pid": os.getpid(),
            "host": socket.gethostname(), "process_start": stat[1] if stat else None,
            "started_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "command": shlex.join(sys.argv)}


def _write_claim(folder: Path, record: dict) -> None:
    """Create ``folder/.pairvel-claim`` (never over another one) holding ``record``."""
    fd = os.open(folder / CLAIM_FILE, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    with os.fdopen(fd, "w") as fh:
        fh.write(json.dumps(record, indent=2) + "\n")


def _read_claim(folder: Path):
    """The claim record in ``folder``: None when there is none, {} when it cannot be read."""
    try:
        record = json.loads((folder / CLAIM_FILE).read_text())
    except FileNotFoundError:
        return None
    except (OSError, ValueError):  # unreadable, not UTF-8, not JSON
        return {}
    return record if isinstance(record, dict) and record.get("kind") == _CLAIM_KIND else {}


def _is_stale(record) -> bool:
    """True only when the claiming process ran on this host and provably no longer runs."""
    if not record or record.get("host") != socket.gethostname():
        return False
    pid = record.get("pid")
    if not isinstance(pid, int) or isinstance(pid, bool) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except OSError:  # EPERM: it exists under another user
        pass
    stat = _proc_stat(pid)
    if stat is None:
        return False
    state, start = stat
    return state in ("Z", "X") or (record.get("process_start") not in (None, start))


def _describe(record, claim_file: Path) -> str:
    if not record:
        return (f"claim file {claim_file} cannot be read: being written, or left by a crash; delete it if no pairvel "
                f"command is writing there")
    return (f"by pid {record.get('pid')} on host {record.get('host')} since {record.get('started_utc')}; "
            f"claim file {claim_file}")


def _claimed_error(out: Path, record) -> OutputError:
    return OutputError(f"output folder {out} is claimed by another pairvel command ({_describe(record, out / CLAIM_FILE)}); "
                       f"wait for it to finish or choose another output folder", path=out)


# --- manifests ----------------------------------------------------------------------------------

def _walk(folder: Path):
    """(relative POSIX name, path, is_dir, is_symlink) of everything below ``folder``, sorted, parents first."""
    for root, dirs, files in os.walk(folder):
        dirs.sort()
        base = Path(root)
        for name in sorted(dirs) + sorted(files):
            path = base / name
            yield path.relative_to(folder).as_posix(), path, name in dirs, path.is_symlink()


def _write_manifest(folder: Path) -> None:
    files = {rel: {"size": path.stat().st_size, "sha256": file_sha256(path)}
             for rel, path, is_dir, _ in _walk(folder) if not is_dir and rel not in _OWN_FILES}
    (folder / MANIFEST_FILE).write_text(json.dumps({"kind": _MANIFEST_KIND, "files": files}, indent=1) + "\n")


def read_manifest(folder) -> dict | None:
    """{relative name: {"size", "sha256"}} of a pairvel output folder; None when it has no manifest."""
    path = Path(folder) / MANIFEST_FILE
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    files = data.get("files") if isinstance(data, dict) and data.get("kind") == _MANIFEST_KIND else None
    if not isinstance(files, dict) or not all(_plain_relative(rel) for rel in files):
        return None
    return files


def _plain_relative(rel) -> bool:
    """A manifest name must stay inside its folder: relative, no '..', no empty parts."""
    parts = rel.split("/") if isinstance(rel, str) else [""]
    return not rel.startswith("/") and all(p not in ("", ".", "..") for p in parts)


def _unchanged(path: Path, entry) -> bool:
    return (isinstance(entry, dict) and not path.is_symlink() and path.is_file()
            and path.stat().st_size == entry.get("size") and file_sha256(path) == entry.get("sha256"))


def _first_foreign(folder: Path, manifest: dict) -> str | None:
    """The first entry of ``folder`` that is not an unchanged file of ``manifest`` (or pairvel's own)."""
    parents = {p.as_posix() for rel in manifest for p in Path(rel).parents if p != Path(".")}
    for rel, path, is_dir, is_link in _walk(folder):
        if rel in _OWN_FILES:
            continue
        if is_link or (is_dir and rel not in parents) or (not is_dir and rel not in manifest):
            return f"{rel} (not written by pairvel)"
        if not is_dir and not _unchanged(path, manifest[rel]):
            return f"{rel} (changed since pairvel wrote it)"
    return None


# --- checks before claiming -----------------------------------------------------------------------

def _absolute(out_dir) -> Path:
    return Path(out_dir).expanduser().resolve()


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def _check_parent(out: Path) -> None:
    if out.parent == out:
        raise OutputError(f"output folder {out}: the file-system root cannot be an output folder", path=out)
    if not out.parent.is_dir():
        what = "is not a folder" if out.parent.exists() else "does not exist"
        raise OutputError(f"output folder {out}: parent folder {out.parent} {what}", path=out)


def _check_protected(out: Path, protect) -> None:
    """No protected path (the run's inputs) and not the working folder may lie inside ``out``."""
    for label, path in (protect or {}).items():
        if path is not None and _inside(_absolute(path), out):
            raise OutputError(f"output folder {out} must not hold an input of the run; it holds {label} "
                              f"{_absolute(path)}; choose another output folder", path=out, key=label)
    if out.exists() and _inside(Path.cwd().resolve(), out):
        raise OutputError(f"output folder {out} must not hold the working folder {Path.cwd()}; choose another "
                          f"output folder", path=out)


def _refusal(out: Path, *, force: bool, empty_ok: bool) -> str | None:
    """Why the existing folder ``out`` may not be replaced (None: it may)."""
    if empty_ok:
        return None if not any(out.iterdir()) else f"output folder {out} exists and is not empty; choose a new folder"
    if not force:
        return f"output folder {out} exists already; choose another --out or pass --force"
    if not (out / OUTPUT_MARKER).is_file():
        return (f"output folder {out} exists and is not a pairvel output; --force only replaces folders that "
                f"pairvel wrote")
    manifest = read_manifest(out)
    if manifest is None:
        return (f"output folder {out} was written by an older pairvel without a list of its files "
                f"({MANIFEST_FILE}), so --force cannot tell them from yours; move or delete it yourself")
    foreign = _first_foreign(out, manifest)
    if foreign is not None:
        return f"output folder {out} holds {foreign}; --force replaces only a folder holding nothing but its outputs"
    return None


def prepare_output_dir(out_dir, *, force: bool = False, protect=None) -> Path:
    """Check that ``out_dir`` may be written (nothing is created or claimed); return it as an absolute Path.

    The checks of :func:`claim_output_dir`, for a caller that only wants to know.
    """
    out = _absolute(out_dir)
    _check_parent(out)
    _check_protected(out, protect)
    if out.exists() or out.is_symlink():
        if not out.is_dir():
            raise OutputError(f"output folder {out} exists and is not a folder", path=out)
        record = _read_claim(out)
        if record is not None and not _is_stale(record):
            raise _claimed_error(out, record)
        reason = _refusal(out, force=force, empty_ok=False)
        if reason:
            raise OutputError(reason, path=out)
    return out


# --- stale claims of dead runs ---------------------------------------------------------------------

def _clear_stale(out: Path) -> None:
    """Remove the claim files and hidden work folders that dead runs left at ``out``."""
    prefix = f".{out.name}.partial-"
    with os.scandir(out.parent) as entries:
        hidden = [Path(e.path) for e in entries if e.name.startswith(prefix) and e.is_dir(follow_symlinks=False)]
    for folder in hidden:
        record = _read_claim(folder)
        if record and _is_stale(record):
            _log.info("removing %s, left by pid %s that no longer runs", folder, record.get("pid"))
            if record.get("role") == "work":
                shutil.rmtree(folder, ignore_errors=True)
            else:  # an old target swapped out just before the process died
                _empty_old_target(folder, out)
    if out.is_dir() and not out.is_symlink():
        record = _read_claim(out)
        if record and _is_stale(record):
            _log.info("removing the claim on %s of pid %s that no longer runs", out, record.get("pid"))
            _release_target(out, record)


def _release_target(out: Path, record: dict) -> None:
    """Delete the claim file ``record`` of ``out``; remove ``out`` too when that claim created it and it is empty."""
    with contextlib.suppress(FileNotFoundError):
        (out / CLAIM_FILE).unlink()
    if record.get("created"):
        with contextlib.suppress(OSError):  # not empty: someone put something there; keep it
            out.rmdir()


def _empty_old_target(folder: Path, out: Path) -> Path | None:
    """Delete pairvel's files from a swapped-out target; keep the rest under a visible name (returned)."""
    manifest = read_manifest(folder) or {}
    for rel, entry in manifest.items():
        path = folder / rel
        if _unchanged(path, entry):
            path.unlink()
    for name in _OWN_FILES:
        with contextlib.suppress(FileNotFoundError):
            (folder / name).unlink()
    for _rel, path, is_dir, is_link in sorted(_walk(folder), reverse=True):  # children before parents
        if is_dir and not is_link:
            with contextlib.suppress(OSError):
                path.rmdir()
    try:
        folder.rmdir()
        return None
    except OSError:
        pass
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    kept = out.parent / f"{out.name}.replaced-{stamp}"
    if kept.exists():
        kept = out.parent / f"{out.name}.replaced-{stamp}-{secrets.token_hex(3)}"
    os.rename(folder, kept)
    return kept


# --- the claim ------------------------------------------------------------------------------------

_RENAME_EXCHANGE = 2
_AT_FDCWD = -100


def _renameat2():
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError, TypeError):
        return None
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    return fn


def _exchange(a: Path, b: Path) -> bool:
    """Swap the folders ``a`` and ``b`` in one step; False where the system cannot (nothing changed then)."""
    fn = _renameat2()
    if fn is None:
        return False
    if fn(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def _swap(work: Path, out: Path) -> Path:
    """Put ``work`` at ``out``; return where the folder previously at ``out`` now is (hidden, beside)."""
    if _exchange(work, out):
        return work
    old = work.with_name(work.name + "-old")
    os.rename(out, old)
    try:
        os.rename(work, out)
    except OSError:
        os.rename(old, out)
        raise
    return old


@contextlib.contextmanager
def _signals_held():
    """Hold back SIGINT and SIGTERM (main thread, POSIX) so a swap and its bookkeeping finish together."""
    if not hasattr(signal, "pthread_sigmask") or threading.current_thread() is not threading.main_thread():
        yield
        return
    held = {signal.SIGINT, signal.SIGTERM}
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, held)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


class OutputClaim:
    """A claimed output path and its hidden work folder; see the module docstring.

    Use as a context manager: leaving it releases the claim, removing everything the command made
    unless :meth:`write` completed.  Make one with :func:`claim_output_dir`.
    """

    def __init__(self, path: Path, token: str, record: dict):
        self.path = path
        self._token = token
        self._record = record
        self._work = path.parent / f".{path.name}.partial-{token}"
        self._on_failure = []
        self.written = False

    def remove_on_failure(self, path) -> None:
        """Delete ``path`` (a file this command made outside the folder) if the command does not complete."""
        self._on_failure.append(Path(path))

    def write(self, fill, *, run_log=None) -> Path:
        """Call ``fill(work_folder)``, add run.log, manifest and marker, and swap the folder in; return the path.

        ``run_log``, a callable returning text, is called after ``fill`` and its text written to
        :data:`RUN_LOG`, so the log holds every record up to the swap.
        """
        if self.written:
            raise RuntimeError(f"output folder {self.path} was written already")  # a bug, not user input
        _log.debug("filling %s, to be swapped in at %s", self._work, self.path)
        try:
            fill(self._work)
            if run_log is not None:
                (self._work / RUN_LOG).write_text(run_log())
            _write_manifest(self._work)
            (self._work / OUTPUT_MARKER).write_text("written by pairvel\n")
            with _signals_held():
                old = _swap(self._work, self.path)
                self.written = True
                (self.path / CLAIM_FILE).unlink()
                kept = _empty_old_target(old, self.path)
        except OSError as err:
            if self.written:
                raise OutputError(f"output folder {self.path}: written, but tidying up failed ({err.strerror or err})",
                                  path=self.path) from None
            raise OutputError(f"output folder {self.path}: cannot be written ({err.strerror or err})",
                              path=self.path) from None
        if kept is not None:
            warnings.warn(f"output folder {self.path}: files added to it during the run were kept in {kept}",
                          PairvelWarning, stacklevel=2)
        return self.path

    def release(self) -> None:
        """Give the path up; unless :meth:`write` completed, remove everything this command made."""
        if self.written:
            return
        shutil.rmtree(self._work, ignore_errors=True)
        record = _read_claim(self.path)
        if record and record.get("token") == self._token:
            _release_target(self.path, record)
        for path in self._on_failure:
            with contextlib.suppress(OSError):
                path.unlink()

    def __enter__(self) -> OutputClaim:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.release()
        if exc is not None and self.written and isinstance(exc, KeyboardInterrupt):
            exc.output_written = self.path  # interrupted after the outputs were in place


def claim_output_dir(out_dir, *, force: bool = False, protect=None, replace_empty: bool = False) -> OutputClaim:
    """Claim ``out_dir`` for one command before its work starts.

    Parameters
    ----------
    out_dir : str or Path
        The output folder; relative to the working folder.
    force : bool, default False
        Allow replacing an existing pairvel output (see the module docstring for which ones).
    protect : dict {label: path}, optional
        Paths that must not lie inside the folder (the run's config and inputs); the label names
        one in the error message, e.g. ``"catalogue.path"``.
    replace_empty : bool, default False
        Allow replacing an existing empty folder.

    Returns
    -------
    OutputClaim
        Holds the path; write with :meth:`OutputClaim.write`, release by leaving its context.

    Raises
    ------
    OutputError
        The parent folder is missing or unwritable, the folder exists and may not be replaced,
        another command claims it, or it would hold a protected path.
    """
    out = _absolute(out_dir)
    _check_parent(out)
    _clear_stale(out)
    _check_protected(out, protect)
    claim = None
    try:
        with _signals_held():  # a signal between creating the folder and its claim record would orphan it
            claim = _take(out, force=force, replace_empty=replace_empty)
            _add_work_folder(claim)
    except BaseException:
        if claim is not None:
            claim.release()
        raise
    _log.debug("claimed output folder %s (work folder %s)", out, claim._work)
    return claim


def _take(out: Path, *, force: bool, replace_empty: bool) -> OutputClaim:
    """Create ``out`` or check that the existing folder may be replaced, then write the claim file in it."""
    created = not (out.exists() or out.is_symlink())
    if created:
        try:
            os.mkdir(out, 0o777)
        except FileExistsError:
            created = False
        except OSError as err:
            raise OutputError(f"output folder {out}: cannot be created ({err.strerror or err})", path=out) from None
    if not created:  # checked before claiming, so a refused folder is not touched
        if not out.is_dir():
            raise OutputError(f"output folder {out} exists and is not a folder", path=out)
        record = _read_claim(out)
        if record is not None:
            raise _claimed_error(out, record)
        reason = _refusal(out, force=force, empty_ok=replace_empty)
        if reason:
            raise OutputError(reason, path=out)
    token = f"{os.getpid()}-{secrets.token_hex(4)}"
    record = _claim_record("target", token, created=created)
    try:
        _write_claim(out, record)
    except FileExistsError:
        raise _claimed_error(out, _read_claim(out)) from None
    except OSError as err:
        if created:
            with contextlib.suppress(OSError):
                out.rmdir()
        raise OutputError(f"output folder {out}: cannot be claimed ({err.strerror or err})", path=out) from None
    return OutputClaim(out, token, record)


def _add_work_folder(claim: OutputClaim) -> None:
    """Create the claim's hidden work folder beside the output, with its own claim record."""
    try:
        os.mkdir(claim._work, 0o777)
        _write_claim(claim._work, _claim_record("work", claim._token, created=True))
    except OSError as err:
        raise OutputError(f"output folder {claim.path}: cannot write beside it in {claim.path.parent} "
                          f"({err.strerror or err})", path=claim.path) from None


def write_folder_atomically(out_dir, fill, *, force: bool = False, run_log=None, claim=None) -> Path:
    """Call ``fill(work_folder)`` and swap the filled folder in at ``out_dir``; all or nothing.

    ``claim`` is an :class:`OutputClaim` on ``out_dir`` that the caller holds (and releases);
    without one the folder is claimed here (with ``force``) and released at the end.  ``run_log``
    as in :meth:`OutputClaim.write`.  On failure nothing this call made is left.
    """
    if claim is not None:
        if claim.path != _absolute(out_dir):
            raise ValueError(f"the claim is on {claim.path}, not on {out_dir}")  # a bug, not user input
        return claim.write(fill, run_log=run_log)
    with claim_output_dir(out_dir, force=force) as own:
        return own.write(fill, run_log=run_log)
