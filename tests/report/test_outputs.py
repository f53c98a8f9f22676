"""The atomic folder writer and its optional run log."""

import pytest

from pairvel.core.errors import OutputError
from pairvel.report.folders import MANIFEST_FILE, read_manifest
from pairvel.report.outputs import OUTPUT_MARKER, RUN_LOG, write_folder_atomically


def test_run_log_is_the_last_file_written_before_the_rename(tmp_path):
    calls = []

    def fill(tmp):
        calls.append("fill")
        (tmp / "table.txt").write_text("1 2 3\n")

    def run_log():
        calls.append("log")
        return "2026-01-01T00:00:00.000Z INFO    a line\n"

    out = write_folder_atomically(tmp_path / "out", fill, run_log=run_log)
    assert calls == ["fill", "log"]
    assert (out / RUN_LOG).read_text() == "2026-01-01T00:00:00.000Z INFO    a line\n"
    assert sorted(p.name for p in out.iterdir()) == sorted([OUTPUT_MARKER, MANIFEST_FILE, RUN_LOG, "table.txt"])
    assert sorted(read_manifest(out)) == [RUN_LOG, "table.txt"]  # the log is listed with the outputs


def test_no_run_log_by_default(tmp_path):
    out = write_folder_atomically(tmp_path / "out", lambda tmp: (tmp / "a.txt").write_text("a"))
    assert not (out / RUN_LOG).exists()


def test_failed_fill_never_asks_for_the_log_and_leaves_nothing(tmp_path):
    def broken(tmp):
        raise OSError(28, "No space left on device")

    def run_log():
        raise AssertionError("run_log must not be called when fill fails")

    with pytest.raises(OutputError, match="cannot be written"):
        write_folder_atomically(tmp_path / "out", broken, run_log=run_log)
    assert list(tmp_path.iterdir()) == []
