"""Others' CPU load, checked against the operating system's own accounting of known work: a
separate process that spins (counted) and this process spinning (not counted)."""

from __future__ import annotations

import subprocess
import sys
import time

import pytest

from evalkit.cpu_load import BUSY_CORES, MIN_SECONDS, OtherLoad, busy_note

SPIN = "import time\nt = time.time()\nwhile time.time() - t < {seconds}: pass\n"


@pytest.fixture
def spinner():
    """Another process keeping one core busy for a few seconds."""
    proc = subprocess.Popen([sys.executable, "-c", SPIN.format(seconds=8)])
    time.sleep(0.5)  # let it start
    yield proc
    proc.kill()
    proc.wait()


def test_another_process_spinning_counts_as_one_core(spinner):
    load = OtherLoad()
    time.sleep(1.0)
    cores = load.cores()
    assert 0.7 <= cores <= 1.5, cores  # one core's worth, give or take the rest of the machine
    note = busy_note(load, "in this test")
    assert note and note.startswith(f"other processes kept {cores:.1f} of ") and "in this test" in note


def test_this_process_spinning_is_not_counted():
    load = OtherLoad()
    t = time.perf_counter()
    while time.perf_counter() - t < 1.0:
        pass
    assert load.cores() < BUSY_CORES
    assert busy_note(load, "here") is None


def test_too_short_a_span_is_not_judged(spinner):
    load = OtherLoad()
    assert load.seconds() < MIN_SECONDS and busy_note(load, "at once") is None
