"""Turn a study into conditions and prompts, drive a backend, fill the store.

Work is resumable: a record already in the run's store is never recomputed, and a prompt
whose completion is in the generation cache is not sent to the model again.
"""

from __future__ import annotations

import functools
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable

from .answers import score
from .compute import PeakMemory
from .cpu_load import OtherLoad, busy_note
from .backends.base import Backend, Completion
from .data import Exemplar, Question, TaskData, load_task_data
from .errors import EvalkitError, EvalkitWarning
from .prompts import draw_exemplars, render, sha256_text, template_source
from .spec import Condition, Study, load_task
from .store import GenerationCache, Record, RunStore, cache_key

__all__ = ["PlannedCondition", "expand", "run_study", "BackendFactory", "default_cache_path"]

BackendFactory = Callable[[str, Study], Backend]
REASONING_STYLES = ("worked", "worked-zero")


@dataclass
class PlannedCondition:
    """A condition with its task data and drawn exemplars."""

    condition: Condition
    task: TaskData
    exemplars: list[Exemplar]
    questions: list[Question] = field(default_factory=list)

    @property
    def id(self) -> str:
        return self.condition.id

    @property
    def exemplar_ids(self) -> list[str]:
        return [e.id for e in self.exemplars]


def default_cache_path() -> Path:
    """The generation cache: $EVALKIT_GENERATION_CACHE, else generations.sqlite in the evalkit cache."""
    import os

    if os.environ.get("EVALKIT_GENERATION_CACHE"):
        return Path(os.environ["EVALKIT_GENERATION_CACHE"])
    from .model_cache import cache_root

    return cache_root() / "generations.sqlite"


def expand(study: Study, tasks: list[TaskData] | None = None) -> list[PlannedCondition]:
    """The study's grid as conditions, model-major so each model is loaded once.

    `worked-zero` carries no exemplars, so it becomes one 0-shot condition whatever the shots;
    a 0-shot condition has one draw, since every draw would be the same prompt.
    """
    if tasks is None:
        tasks = [load_task_data(load_task(p)) for p in study.task_paths()]
    planned: list[PlannedCondition] = []
    seen: set[str] = set()
    for model in study.models:
        for task in tasks:
            questions = task.questions[: study.limit] if study.limit else task.questions
            for style in study.styles:
                shot_list = [0] if style == "worked-zero" else study.shots
                for shots in shot_list:
                    for draw in range(study.draws if shots > 0 else 1):
                        ex = draw_exemplars(task.exemplars, shots, study.seed, draw)
                        calc = (False, True) if study.calculator and style in REASONING_STYLES else (False,)
                        for calculator in calc:
                            cond = Condition(task=task.spec.name, model=model, style=style, shots=shots,
                                             draw=draw, seed=study.seed, calculator=calculator)
                            if cond.id not in seen:
                                seen.add(cond.id)
                                planned.append(PlannedCondition(cond, task, ex, questions))
    return planned


def _settings(pc: PlannedCondition, study: Study, backend_info: dict) -> dict:
    style = pc.condition.style
    return {
        "exemplar_ids": pc.exemplar_ids,
        "template_sha256": sha256_text(template_source(pc.task.spec, style)),
        "max_new_tokens": study.decoding.limit(style),
        "stop": list(study.decoding.stop),
        "dtype": study.decoding.dtype,
        "model_sha256": backend_info.get("sha256"),
        "answer": pc.task.spec.answer.model_dump(),
        "calculator": pc.condition.calculator,
    }


def _default_factory(model: str, study: Study) -> Backend:
    from .backends.local import LocalBackend

    d = study.decoding
    return LocalBackend(model, dtype=d.dtype, threads=d.threads, batch_size=d.batch_size)


class _Progress:
    """One rich progress display for the whole study."""

    def __init__(self, total: int, enabled: bool):
        self.enabled = enabled
        if not enabled:
            return
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                                   TimeElapsedColumn, TimeRemainingColumn)

        from .console import console

        self.bar = Progress(
            TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
            TextColumn("{task.fields[rate]}"), TimeElapsedColumn(), TextColumn("left"),
            TimeRemainingColumn(), transient=False, console=console(stderr=True),
        )
        self.task = self.bar.add_task("starting", total=total, rate="")
        self.start = time.perf_counter()
        self.fresh = 0
        self.bar.start()

    def describe(self, text: str) -> None:
        if self.enabled:
            self.bar.update(self.task, description=text)

    def advance(self, generated: bool) -> None:
        if not self.enabled:
            return
        self.fresh += generated
        rate = self.fresh / max(time.perf_counter() - self.start, 1e-9)
        self.bar.update(self.task, advance=1, rate=f"{rate:.2f} items/s")

    def close(self) -> None:
        if self.enabled:
            self.bar.stop()


def _record(pc: PlannedCondition, q, prompt: str, c: Completion, cached: bool) -> Record:
    spec = pc.task.spec.answer
    extraction, ok = score(c.text, q.answer, spec.kind, tolerance=spec.tolerance,
                           relative=spec.relative, choices=spec.choices)
    outcome = "no answer" if extraction.method == "none" else ("correct" if ok else "wrong")
    return Record(
        condition_id=pc.id, question_id=q.id, question=q.question, gold=q.answer, grp=q.group,
        prompt_sha=sha256_text(prompt), prompt=prompt, completion=c.text,
        extracted=extraction.value, extracted_raw=extraction.raw, method=extraction.method,
        correct=bool(ok), outcome=outcome, prompt_tokens=c.prompt_tokens, new_tokens=c.new_tokens,
        seconds=c.seconds, min_margin=c.min_margin, finish=c.finish, cached=cached, extra=c.extra,
    )


def run_conditions(store: RunStore, study: Study, planned: Iterable[PlannedCondition],
                   backend_factory: BackendFactory | None = None, use_cache: bool = True,
                   progress: bool = True, on_backend: Callable[[str, Backend], None] | None = None) -> dict:
    """Fill the store with every missing record of the planned conditions; returns counts."""
    planned = list(planned)
    factory = backend_factory or _default_factory
    cache = GenerationCache(default_cache_path()) if use_cache else None
    counts = {"generated": 0, "cached": 0, "resumed": 0}
    todo_total = sum(len(pc.questions) for pc in planned)
    bar = _Progress(todo_total, progress)
    warned_busy = False
    try:
        by_model: dict[str, list[PlannedCondition]] = {}
        for pc in planned:
            by_model.setdefault(pc.condition.model, []).append(pc)
        for model, conds in by_model.items():
            bar.describe(f"loading {model}")
            loading = OtherLoad()  # others' load while this process loads: a warning before any timing
            backend = factory(model, study)
            if not warned_busy:
                note = busy_note(loading, f"while {model} loaded")
                if note:
                    warned_busy = True
                    warnings.warn(note, EvalkitWarning, stacklevel=2)
            info = backend.describe()
            if on_backend:
                on_backend(model, backend)
            for i, pc in enumerate(conds, 1):
                cond = pc.condition
                bar.describe(f"{model} {cond.style} {cond.shots}-shot d{cond.draw} ({i}/{len(conds)})")
                settings = _settings(pc, study, info)
                store.add_condition(pc.id, cond.label, cond.task, cond.model, cond.arm, cond.shots,
                                    cond.draw, cond.seed, settings)
                done = store.done_ids(pc.id)
                pending = []
                for q in pc.questions:
                    if q.id in done:
                        counts["resumed"] += 1
                        bar.advance(False)
                        continue
                    text = render(pc.task, cond.style, pc.exemplars, q.question, chat=backend.chat)
                    prompt = backend.format_prompt(text)
                    key = cache_key(str(info.get("sha256")), study.decoding.dtype, prompt,
                                    settings["max_new_tokens"], settings["stop"],
                                    mode="calculator" if cond.calculator else "greedy")
                    hit = cache.get(key) if cache is not None else None
                    if hit is not None:
                        c = Completion(text=hit["completion"], prompt_tokens=hit["prompt_tokens"],
                                       new_tokens=hit["new_tokens"], min_margin=hit["min_margin"],
                                       finish=hit["finish"], seconds=hit["seconds"], extra=hit["extra"])
                        store.add_record(_record(pc, q, prompt, c, cached=True))
                        counts["cached"] += 1
                        bar.advance(False)
                    else:
                        pending.append((q, prompt, key))
                if not pending:
                    continue

                def on_result(j: int, c: Completion, _pending=pending, _pc=pc) -> None:
                    q, prompt, key = _pending[j]
                    if cache is not None:
                        cache.put(key, c.text, c.prompt_tokens, c.new_tokens, c.min_margin, c.finish,
                                  c.seconds, c.extra)
                    store.add_record(_record(_pc, q, prompt, c, cached=False))
                    counts["generated"] += 1
                    bar.advance(True)

                generate = backend.generate
                if cond.calculator:
                    from .calculator import calculator_generate

                    generate = functools.partial(calculator_generate, backend)
                with PeakMemory() as mem:
                    generate([p for _, p, _ in pending], max_new_tokens=settings["max_new_tokens"],
                             stop=settings["stop"], on_result=on_result)
                store.add_cost(pc.id, mem.seconds, mem.peak)
            close = getattr(backend, "close", None)
            if close:
                close()
            del backend
    finally:
        bar.close()
        if cache is not None:
            cache.close()
    return counts


def run_study(study: Study, out: str | Path | None = None, backend_factory: BackendFactory | None = None,
              use_cache: bool = True, progress: bool = True):
    """Run every condition of a study into a run folder; return the finished run."""
    from .run import finish_run, open_run_folder

    tasks = [load_task_data(load_task(p)) for p in study.task_paths()]
    planned = expand(study, tasks)
    if not planned:
        raise EvalkitError("the study expands to no conditions; check its styles and shots")
    if backend_factory is None:
        from .models import resolve

        for model in study.models:  # a bad reference fails before anything is written
            resolve(model)
    run_dir, store, manifest = open_run_folder(study, tasks, out)
    started = time.perf_counter()
    others = OtherLoad()
    backends: dict[str, dict] = {}
    try:
        counts = run_conditions(store, study, planned, backend_factory, use_cache, progress,
                                on_backend=lambda m, b: backends.__setitem__(m, b.describe()))
    finally:
        store.close()
    cores = others.cores()
    note = busy_note(others, "on average during the run", advice=False)
    if note:
        warnings.warn(note, EvalkitWarning, stacklevel=2)
    return finish_run(run_dir, manifest, backends, {**counts, "other_processes_cores": round(cores, 2)},
                      time.perf_counter() - started)
