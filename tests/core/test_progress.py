"""Progress lines are log records of the ``pairvel`` logger; the library itself configures nothing."""

import io
import logging
import subprocess
import sys
from pathlib import Path

import pytest

from pairvel.core.progress import Progress

ROOT = Path(__file__).resolve().parents[2]


def test_library_use_prints_nothing_without_logging_setup():
    """A fresh interpreter (no pytest handlers on the root logger): progress, stages and a
    WARNING record of the pairvel logger reach neither stdout nor stderr."""
    script = (
        "import logging\n"
        "from pairvel.core.progress import Progress\n"
        "p = Progress(2)\n"
        "with p.stage('one'):\n"
        "    p.say('a line')\n"
        "    p.counter('items')(5, 5)\n"
        "logging.getLogger('pairvel.cli').warning('not shown: no handler was configured')\n"
        "handlers = logging.getLogger('pairvel').handlers\n"
        "assert [type(h).__name__ for h in handlers] == ['NullHandler'], handlers\n"
        "assert logging.getLogger('pairvel').level == logging.NOTSET\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=ROOT,
                          env={"PYTHONPATH": str(ROOT), "PATH": ""}, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout == "" and done.stderr == ""


def test_stage_say_and_counter_are_info_records(caplog):
    caplog.set_level(logging.DEBUG, logger="pairvel")
    p = Progress(2)
    with p.stage("catalogue"):
        p.say("      12 tracers kept")
        tick = p.counter("apertures")
        for done in range(0, 101, 5):
            tick(done, 100)
    records = [r for r in caplog.records if r.name.startswith("pairvel")]
    assert {r.levelno for r in records} == {logging.INFO}
    assert {r.name for r in records} == {"pairvel.core.progress"}
    lines = [r.getMessage() for r in records]
    assert lines[:2] == ["[1/2] catalogue ...", "      12 tracers kept"]
    assert lines[-1].startswith("[1/2] catalogue: done in ") and lines[-1].endswith(" s")
    counts = [line for line in lines if "apertures:" in line]
    assert counts[0] == "      apertures: 0/100 (0%)" and counts[-1] == "      apertures: 100/100 (100%)"
    assert len(counts) == 11                 # one line per tenth, not per call
    assert p.elapsed >= 0.0


def test_quiet_emits_no_record_even_at_debug(caplog):
    caplog.set_level(logging.DEBUG, logger="pairvel")
    p = Progress(1, quiet=True)
    with pytest.raises(ValueError):
        with p.stage("x"):
            p.say("hidden")
            p.counter("n")(1, 1)
            raise ValueError("stage fails")
    assert not [r for r in caplog.records if r.name.startswith("pairvel")]


def test_failed_stage_is_a_debug_record_not_a_done_line(caplog):
    caplog.set_level(logging.DEBUG, logger="pairvel")
    p = Progress(1)
    with pytest.raises(KeyError):
        with p.stage("pairs"):
            raise KeyError("boom")
    lines = [(r.levelno, r.getMessage()) for r in caplog.records if r.name.startswith("pairvel")]
    assert lines[0] == (logging.INFO, "[1/1] pairs ...")
    assert lines[1][0] == logging.DEBUG and lines[1][1].startswith("[1/1] pairs: stopped by KeyError after ")
    assert len(lines) == 2


def test_stream_still_receives_the_plain_lines():
    stream = io.StringIO()
    p = Progress(1, stream=stream)
    with p.stage("fit"):
        p.say("      chi2 ok")
    text = stream.getvalue().splitlines()
    assert text[:2] == ["[1/1] fit ...", "      chi2 ok"] and text[2].startswith("[1/1] fit: done in ")
