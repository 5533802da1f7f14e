"""The public functions behind the CLI commands; each returns plain data a notebook can use."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Sequence

from .data import TaskData, load_task_data
from .errors import SpecError
from .prompts import draw_exemplars, render
from .spec import Decoding, Study, load_study, load_task

__all__ = ["BUNDLED_TASKS", "DEMO_TASK", "demo_study", "study_for", "run", "preview", "check", "audit",
           "parse_pairs", "compare", "plan", "probe"]

BUNDLED_TASKS = Path(__file__).resolve().parent.parent / "task_specs"
DEMO_TASK = BUNDLED_TASKS / "workshop" / "workshop.toml"


def demo_study(limit: int | None = None, model: str = "smollm2-135m") -> Study:
    """The bundled demo: the workshop task, SmolLM2-135M, direct vs worked, 4 shots."""
    return Study(name="demo", tasks=[str(DEMO_TASK)], models=[model], styles=["direct", "worked"],
                 shots=[4], draws=1, limit=limit)


def _is_study(path: Path) -> bool:
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError):
        return False  # load_task reports the problem with the file named
    return "tasks" in raw


def study_for(target: str | Path, models: Sequence[str] = (), styles: Sequence[str] = (),
              shots: Sequence[int] = (), draws: int | None = None, limit: int | None = None,
              seed: int | None = None, name: str | None = None, **decoding) -> Study:
    """A study from a study file, or from a task spec plus options; options override the file."""
    path = Path(target)
    decoding = {k: v for k, v in decoding.items() if v is not None}
    if _is_study(path):
        base = load_study(path)
        data = base.model_dump()
        data["source_file"] = base.source_file
    else:
        spec = load_task(path)
        if not models:
            raise SpecError(str(path), None, "a task spec needs at least one --model (or use a study file)")
        data = {"name": spec.name, "tasks": [str(path.resolve())], "models": [], "source_file": None}
    for key, value in (("models", list(models)), ("styles", list(styles)), ("shots", list(shots))):
        if value:
            data[key] = value
    for key, value in (("draws", draws), ("limit", limit), ("seed", seed), ("name", name)):
        if value is not None:
            data[key] = value
    if decoding:
        data["decoding"] = {**data.get("decoding", Decoding().model_dump()), **decoding}
    from pydantic import ValidationError

    from .spec import _format_error

    try:
        return Study.model_validate(data)
    except ValidationError as e:
        raise _format_error(path, e) from None


def run(study: Study, out: str | Path | None = None, use_cache: bool = True, progress: bool = True,
        backend_factory=None):
    """Run a study into a run folder (resuming one given as `out`); returns the `Run`."""
    from .runner import run_study

    return run_study(study, out=out, backend_factory=backend_factory, use_cache=use_cache, progress=progress)


def check(path: str | Path) -> TaskData:
    """Validate a task spec and its data; returns the loaded task."""
    return load_task_data(load_task(path))


def preview(path: str | Path, style: str = "worked", shots: int = 4, draw: int = 0, seed: int = 0,
            question: str | None = None, model: str | None = None, backend=None) -> str:
    """Exactly the text a model will see for one question of a task."""
    from .errors import DataError

    task = check(path)
    if question is None:
        q = task.questions[0]
    else:
        matches = [x for x in task.questions if x.id == question]
        if not matches and question.isdigit() and int(question) < len(task.questions):
            matches = [task.questions[int(question)]]
        if not matches:
            raise DataError(f"{path}: no question with id '{question}' (first ids: "
                            f"{', '.join(task.question_ids()[:5])})")
        q = matches[0]
    if style == "worked-zero":
        shots = 0
    exemplars = draw_exemplars(task.exemplars, shots, seed, draw)
    if backend is None and model is not None:
        from .backends.local import LocalBackend

        backend = LocalBackend(model)
    chat = bool(getattr(backend, "chat", False))
    text = render(task, style, exemplars, q.question, chat=chat)
    return backend.format_prompt(text) if backend is not None else text


def audit(run_dir: str | Path):
    """Add chain verdicts to a run's store, rebuild its reports; returns verdict counts per condition."""
    from .report.build import write_reports
    from .run import load_run
    from .run_audit import audit_run, verdict_counts

    verdicts = audit_run(run_dir)
    write_reports(load_run(run_dir))
    return verdict_counts(verdicts)


def parse_pairs(pairs: Sequence[str]) -> list[tuple[str, str]] | None:
    """'a:b' strings (settings by label or by style) as (a, b) pairs; None for the default pairs."""
    from .errors import EvalkitError

    out = []
    for p in pairs:
        a, sep, b = p.partition(":")
        if not sep or not a.strip() or not b.strip():
            raise EvalkitError(f"--pair '{p}': write it as A:B, e.g. direct:worked")
        out.append((a.strip(), b.strip()))
    return out or None


def compare(run_dir: str | Path, pairs: Sequence[tuple[str, str]] | None = None, alpha: float = 0.05,
            target_difference: float = 0.05):
    """Paired comparisons of a run's settings; writes comparisons.csv and the forest plot; returns the table."""
    from .report.forest import forest_plot
    from .run import load_run
    from .stats import compare as compare_records

    run = load_run(run_dir)
    table = compare_records(run.records, pairs=list(pairs) if pairs else None, alpha=alpha,
                            target_difference=target_difference)
    table.to_csv(Path(run_dir) / "comparisons.csv", index=False)
    if len(table):
        forest_plot(table, Path(run_dir) / "plots" / "comparisons")
    return table


def plan(accuracy: float, difference: float, discordance: float | None = None, alpha: float = 0.05,
         power: float = 0.8):
    """Questions needed to detect a difference, before any model runs (see evalkit.power.plan)."""
    from .power import plan as plan_questions

    return plan_questions(accuracy, difference, discordance, alpha, power)


def probe(run_dir: str | Path, limit: int | None = None, seed: int = 0, progress: bool = True,
          backend_factory=None, as_text: bool = False):
    """Early-answering and injected-mistake probes of a run's chains; returns change rates per
    condition (shares; with ``as_text``, each as text with its 95% Wilson interval)."""
    from .probes import probe_intervals, probe_rates, probe_run
    from .report.build import write_reports
    from .run import load_run

    probes = probe_run(run_dir, backend_factory=backend_factory, limit=limit, seed=seed, progress=progress)
    run = load_run(run_dir)
    write_reports(run)
    return (probe_intervals if as_text else probe_rates)(probes, run.records)
