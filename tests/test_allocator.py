"""settle_allocator keeps megabyte-sized freed blocks in the process (glibc only).

Checked in fresh processes (the setting is process-wide and made once), by the effect it is
for: page faults when a block of a few megabytes is allocated again after being freed. With
glibc's defaults at the start of a process such a block is mmapped, unmapped on free, and
faulted in afresh (one minor fault per 4 KiB page, counted by the kernel in getrusage).
"""

from __future__ import annotations

import os
import platform
import subprocess
import sys

import pytest

pytestmark = pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
                                reason="mallopt thresholds are glibc's")

PROBE = r"""
import resource, sys
from evalkit.backends.allocator import settle_allocator
print(settle_allocator(), settle_allocator())
def faults_of_new_block():
    a = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    block = bytearray(8 << 20)   # 8 MiB, zero-filled: every page touched
    b = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    del block
    return b - a
faults_of_new_block()            # the first block of its size is new memory either way
print(faults_of_new_block())
"""


def _probe(**env) -> tuple[str, int]:
    out = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, timeout=120,
                         env={**os.environ, **env}, check=True).stdout.split("\n")
    return out[0], int(out[1])


def test_settled_allocator_reuses_a_freed_block_instead_of_faulting_it_in_again():
    applied, faults = _probe(EVALKIT_MALLOC_DEFAULTS="0")
    assert applied == "True True"
    assert faults < 200  # 8 MiB is 2048 pages: reused memory faults (almost) none of them


def test_opt_out_leaves_glibc_defaults():
    applied, faults = _probe(EVALKIT_MALLOC_DEFAULTS="1")
    assert applied == "False False"
    # glibc's default: the 8 MiB block was mmapped, unmapped on free, and is faulted in again
    # (its dynamic threshold then rises, which is why only a process's first blocks pay).
    assert faults > 1500
