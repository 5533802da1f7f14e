"""How much of the CPU other processes take while evalkit runs.

A run's timings (each record's seconds, a condition's wall seconds, items/s) are only as good as
the machine was quiet. On a 2-core machine, with one core kept busy by another process, the
same 12 ferry-timetable records (SmolLM2-135M, direct and worked, 2 shots) took 45.6 and 64.1 s
with torch on 2 threads against 5.6 s on the idle machine; on 1 thread 21.7 and 21.0 s against
7.9 s (measured here, 2026-12-04). torch's threads wait for each other at every operation, so
one thread that shares its core with another process holds up all of them. The completions are
the same; only the time is not.

:class:`OtherLoad` measures, between two moments, the CPU time the whole machine spent busy
(psutil's system-wide counters; time the hypervisor gave to other machines, "steal", counted as
busy) minus the CPU time of this process, in cores' worth: 1.0 means one core kept fully busy by
someone else. The runner measures it while each model loads (a warning before any timing, at
no cost: this process's own loading work is subtracted) and over the whole run (kept in the
manifest as ``last_session.other_processes_cores`` and said in the report).
"""

from __future__ import annotations

import os
import time

import psutil

__all__ = ["BUSY_CORES", "MIN_SECONDS", "OtherLoad", "busy_note"]

BUSY_CORES = 0.5  # others' load, in cores, from which a run's timings are flagged (our rule)
MIN_SECONDS = 0.2  # shorter spans are not judged: the counters tick every 10 ms or so


def _busy_seconds() -> float:
    """CPU seconds the whole machine has spent neither idle nor waiting for I/O."""
    t = psutil.cpu_times()
    total = sum(t) - getattr(t, "guest", 0.0) - getattr(t, "guest_nice", 0.0)  # guest is inside user/nice
    return total - t.idle - getattr(t, "iowait", 0.0)


def _own_seconds() -> float:
    t = psutil.Process().cpu_times()
    return t.user + t.system + t.children_user + t.children_system


class OtherLoad:
    """Cores' worth of CPU that processes other than this one used since the object was made."""

    def __init__(self) -> None:
        self.t0, self.busy0, self.own0 = time.perf_counter(), _busy_seconds(), _own_seconds()

    def seconds(self) -> float:
        return time.perf_counter() - self.t0

    def cores(self) -> float:
        wall = self.seconds()
        if wall <= 0:
            return 0.0
        others = (_busy_seconds() - self.busy0) - (_own_seconds() - self.own0)
        return max(0.0, others / wall)


def busy_note(load: OtherLoad, when: str, advice: bool = True) -> str | None:
    """A sentence for the user when others' load since ``load`` began reaches :data:`BUSY_CORES`
    over at least :data:`MIN_SECONDS`, else None."""
    if load.seconds() < MIN_SECONDS:
        return None
    cores = load.cores()
    if cores < BUSY_CORES:
        return None
    n = os.cpu_count() or 1
    text = f"other processes kept {cores:.1f} of {n} cores busy {when}: "
    if not advice:
        return text + "this run's timings are slower and noisier than on a quiet machine (the report says so)"
    return text + ("this run's timings (seconds per record and condition, items/s) will be slower and noisier "
                   "than on a quiet machine, many times slower when torch's threads share cores with them "
                   "(--threads sets how many); the completions are not affected")
