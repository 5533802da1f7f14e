"""The `evalkit` command: a thin typer shell over evalkit's library functions."""

from __future__ import annotations

import functools
import sys
import warnings
from pathlib import Path
from typing import List, Optional

import typer
from rich.table import Table

from .console import console
from .errors import EvalkitError, EvalkitWarning

app = typer.Typer(
    name="evalkit",
    help="Compare prompting styles and model sizes on reasoning tasks, with audited chains and honest statistics.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
out = console()
err = console(stderr=True)
_state = {"debug": False}


def _show_warning(message, category, filename, lineno, file=None, line=None, _default=warnings.showwarning):
    """evalkit's own warnings as one line on stderr; other libraries' as Python prints them."""
    if issubclass(category, EvalkitWarning):
        err.print(f"warning: {message}", markup=False, highlight=False, soft_wrap=True)
    else:
        _default(message, category, filename, lineno, file, line)


@app.callback()
def _main(debug: bool = typer.Option(False, "--debug", help="Show full tracebacks for errors.")) -> None:
    _state["debug"] = debug
    warnings.showwarning = _show_warning


def command(fn):
    """Register a command whose user errors print one line and exit 2."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except EvalkitError as e:
            if _state["debug"]:
                raise
            err.print(f"error: {e}", markup=False, highlight=False, soft_wrap=True)
            raise typer.Exit(2)
        except KeyboardInterrupt:
            err.print("interrupted; finished records are in the store, run the same command to resume")
            raise typer.Exit(130)

    return app.command()(wrapper)


def _summary_table(summary) -> Table:
    t = Table(title="accuracy per condition (95% Wilson interval)")
    for col, justify in (("model", "left"), ("style", "left"), ("shots", "right"), ("draw", "right"),
                         ("accuracy", "right"), ("95% interval", "left"), ("n", "right"), ("no answer", "right")):
        t.add_column(col, justify=justify)
    for r in summary.itertuples():
        t.add_row(r.model, r.style, str(r.shots), str(r.draw), f"{100 * r.accuracy:.1f}%",
                  f"[{100 * r.ci_low:.1f}, {100 * r.ci_high:.1f}]", str(r.n), str(r.no_answer))
    return t


def _frame_table(df, title: str, fmt=str) -> Table:
    """A rich table of a DataFrame: text columns left, the rest right, cells through `fmt`."""
    import pandas as pd

    t = Table(title=title)
    for col in df.columns:
        numeric = pd.api.types.is_numeric_dtype(df[col]) and not pd.api.types.is_bool_dtype(df[col])
        t.add_column(str(col), justify="right" if numeric else "left")
    for row in df.itertuples(index=False):
        t.add_row(*["" if v is None or (isinstance(v, float) and v != v) else fmt(v) for v in row])
    return t


def _print_run(run) -> None:
    out.print(_summary_table(run.summary))
    from .stats import compare, shared_label

    try:
        table = compare(run.records)
    except EvalkitError:  # too few shared questions to compare: the summary stands alone
        table = None
    if table is not None:
        for a, b, v in zip(table["setting_a"], table["setting_b"], table["verdict"]):
            out.print(f"• {shared_label(a, b)}: {v}", highlight=False)
    c = run.counts or {}
    out.print(f"{len(run.records)} records ({c.get('generated', 0)} generated, {c.get('cached', 0)} from the "
              f"cache, {c.get('resumed', 0)} already in the store) in {run.seconds or 0:.1f} s")
    out.print(f"run folder: {run.folder}\nreport: {run.report_path} and {run.html_path}", highlight=False)


_MODEL = typer.Option(None, "--model", "-m", help="Model reference (repeatable): packaged name, .gguf file, folder or hub id.")
_STYLE = typer.Option(None, "--style", "-s", help="Style (repeatable): direct, worked, worked-zero.")
_SHOTS = typer.Option(None, "--shots", "-k", help="Exemplars per prompt (repeatable).")


@command
def demo(
    limit: Optional[int] = typer.Option(None, help="Score only the first N questions."),
    out_dir: Optional[Path] = typer.Option(None, "--out", help="Run folder (default: results/demo-<time>)."),
    no_cache: bool = typer.Option(False, "--no-cache", help="Ignore and do not fill the generation cache."),
) -> None:
    """Run the bundled workshop task on SmolLM2-135M, direct vs worked prompting."""
    from . import api

    _print_run(api.run(api.demo_study(limit=limit), out=out_dir, use_cache=not no_cache))


@command
def run(
    target: Path = typer.Argument(..., help="A study file, or a task spec (then give --model)."),
    model: Optional[List[str]] = _MODEL,
    style: Optional[List[str]] = _STYLE,
    shots: Optional[List[int]] = _SHOTS,
    draws: Optional[int] = typer.Option(None, help="Exemplar draws per style and shot count."),
    limit: Optional[int] = typer.Option(None, help="Score only the first N questions of each task."),
    seed: Optional[int] = typer.Option(None, help="Seed of the exemplar draws."),
    dtype: Optional[str] = typer.Option(None, help="float32 (default) or bfloat16 (faster, changes answers)."),
    batch_size: Optional[int] = typer.Option(None, help="Override the adaptive batch size."),
    threads: Optional[int] = typer.Option(None, help="Torch CPU threads (default: all cores)."),
    out_dir: Optional[Path] = typer.Option(None, "--out", help="Run folder; an existing one is resumed."),
    no_cache: bool = typer.Option(False, "--no-cache", help="Ignore and do not fill the generation cache."),
) -> None:
    """Run a study (or one task on some models) into a run folder and report."""
    from . import api

    study = api.study_for(target, model or (), style or (), shots or (), draws, limit, seed,
                          dtype=dtype, batch_size=batch_size, threads=threads)
    _print_run(api.run(study, out=out_dir, use_cache=not no_cache))


@command
def check(spec: Path = typer.Argument(..., help="Task spec file (TOML).")) -> None:
    """Validate a task spec and its data: fields, ids, exemplar leaks."""
    from . import api

    task = api.check(spec)
    out.print(f"{spec}: ok: task '{task.spec.name}', {len(task.questions)} questions, "
              f"{len(task.exemplars)} exemplars, answer kind {task.spec.answer.kind}", highlight=False)


@command
def preview(
    spec: Path = typer.Argument(..., help="Task spec file (TOML)."),
    style: str = typer.Option("worked", "--style", "-s", help="direct, worked or worked-zero."),
    shots: int = typer.Option(4, "--shots", "-k"),
    draw: int = typer.Option(0, help="Which exemplar draw."),
    seed: int = typer.Option(0, help="Seed of the exemplar draws."),
    question: Optional[str] = typer.Option(None, "--question", "-q", help="Question id or index (default: the first)."),
    model: Optional[str] = typer.Option(None, "--model", "-m", help="Apply this model's chat template."),
) -> None:
    """Show exactly the text a model will see for one question."""
    from . import api

    text = api.preview(spec, style=style, shots=shots, draw=draw, seed=seed, question=question, model=model)
    if model is None:
        err.print("(plain text; pass --model to see it inside the model's chat template)")
    sys.stdout.write(text + "\n")


@command
def report(run_dir: Path = typer.Argument(..., help="A run folder.")) -> None:
    """Rewrite a run's reports (Markdown, HTML, plots) and exports from its store."""
    from .report.build import write_reports
    from .run import export_records, load_run

    r = load_run(run_dir)
    export_records(r.folder, r.records)
    write_reports(r)
    _print_run(r)


@command
def audit(run_dir: Path = typer.Argument(..., help="A run folder.")) -> None:
    """Verify every arithmetic step of the run's chains and add a verdict per record."""
    from . import api

    table = api.audit(run_dir)
    if table.empty:
        out.print("no reasoning records to audit (direct-style records carry no chain)")
        return
    out.print(_frame_table(table, "chain verdicts per condition"))
    out.print(f"verdicts stored in {Path(run_dir) / 'store.sqlite'}; reports rebuilt", highlight=False)


@command
def probe(
    run_dir: Path = typer.Argument(..., help="A run folder with reasoning records."),
    limit: Optional[int] = typer.Option(None, help="Probe only the first N records of each condition."),
    seed: int = typer.Option(0, help="Seed for choosing and changing the corrupted step."),
) -> None:
    """Faithfulness probes: answer early from a cut chain, and continue after an injected mistake."""
    from . import api

    table = api.probe(run_dir, limit=limit, seed=seed, as_text=True)
    if table.empty:
        out.print("no reasoning records with arithmetic steps to probe")
        return
    out.print(_frame_table(table, "share of answers that changed under each probe (95% Wilson interval)"))


@command
def compare(
    run_dir: Path = typer.Argument(..., help="A run folder."),
    pair: Optional[List[str]] = typer.Option(None, "--pair", "-p", help="A:B to compare (styles or setting labels); repeatable. Default: worked vs direct per model and shots."),
    target: float = typer.Option(0.05, help="Difference (share) the power figure speaks of, e.g. 0.05 for 5 points."),
) -> None:
    """Paired comparisons with intervals, McNemar's test, Holm correction and power, in plain words."""
    from . import api

    table = api.compare(run_dir, api.parse_pairs(pair or []), target_difference=target)
    from .stats import shared_label

    t = Table(title="paired comparisons (b − a)")
    for col in ("setting", "a", "b", "n", "difference", "95% interval", "p (Holm)", "detectable at 80%"):
        t.add_column(col, justify="left" if col in ("setting", "a", "b") else "right")
    for r in table.itertuples():
        mdd = f"{100 * r.mdd_80:.1f}" if r.mdd_80 == r.mdd_80 else "none"  # NaN: no difference is detectable
        t.add_row(shared_label(r.setting_a, r.setting_b), r.label_a, r.label_b, str(r.n), f"{100 * r.difference:+.1f}",
                  f"[{100 * r.ci_low:.1f}, {100 * r.ci_high:.1f}]", f"{r.p_holm:.3g}", mdd)
    out.print(t)

    for a, b, v in zip(table["setting_a"], table["setting_b"], table["verdict"]):
        out.print(f"• {shared_label(a, b)}: {v}", highlight=False)
    out.print(f"table: {Path(run_dir) / 'comparisons.csv'}; forest plot: {Path(run_dir) / 'plots' / 'comparisons.svg'}",
              highlight=False)


@command
def plan(
    accuracy: float = typer.Option(..., help="Guessed baseline accuracy, as a share (0.3 for 30%)."),
    difference: float = typer.Option(0.05, help="Smallest difference worth detecting, as a share."),
    discordance: Optional[float] = typer.Option(None, help="Guessed share of questions the two settings disagree on (default: assume independent errors)."),
    power: float = typer.Option(0.8, help="Wanted power."),
    alpha: float = typer.Option(0.05, help="Significance level."),
) -> None:
    """How many questions a comparison needs, before any model runs."""
    from . import api

    p = api.plan(accuracy, difference, discordance, alpha, power)
    out.print(p.summary(), highlight=False)


@command
def diff(
    run_a: Path = typer.Argument(..., help="The earlier run folder."),
    run_b: Path = typer.Argument(..., help="The later run folder."),
) -> None:
    """Which records changed outcome between two runs of one study, with paired statistics."""
    from .rundiff import diff_runs

    d = diff_runs(run_a, run_b)
    out.print(d.summary(), highlight=False)
    if len(d.comparisons):
        t = Table(title="accuracy change per setting (B − A)")
        for col in ("setting", "n", "A", "B", "difference", "95% interval", "p (Holm)"):
            t.add_column(col, justify="left" if col == "setting" else "right")
        for r in d.comparisons.itertuples():
            t.add_row(r.setting, str(r.n), f"{100 * r.accuracy_a:.1f}%", f"{100 * r.accuracy_b:.1f}%",
                      f"{100 * r.difference:+.1f}", f"[{100 * r.ci_low:.1f}, {100 * r.ci_high:.1f}]", f"{r.p_holm:.3g}")
        out.print(t)
    for r in d.changed.head(20).itertuples():
        out.print(f"  {r.question_id_a}  {r.condition_a}: {r.outcome_a} → {r.outcome_b} "
                  f"(extracted {r.extracted_a} → {r.extracted_b})", highlight=False)
    if len(d.changed) > 20:
        out.print(f"  … and {len(d.changed) - 20} more")


@command
def rerun(
    run_dir: Path = typer.Argument(..., help="A run folder to reproduce."),
    out_dir: Optional[Path] = typer.Option(None, "--out", help="Where the new run goes (default: RUN-rerun)."),
) -> None:
    """Re-run a study from its manifest, without the cache, and say whether any record differs."""
    from .rundiff import rerun as rerun_study

    r = rerun_study(run_dir, out=out_dir)
    out.print(r.summary(), highlight=False)
    if not r.identical:
        raise typer.Exit(1)


@command
def models() -> None:
    """List the models evalkit knows and whether they are present in the cache."""
    from .models import list_models

    df = list_models()
    import pandas as pd
    df["size_mb"] = (df.pop("size_bytes") / 1e6).round(1)
    df["parameters"] = df["parameters"].map(lambda n: f"{n / 1e6:.0f}M" if pd.notna(n) else "")
    out.print(_frame_table(df[["name", "kind", "present", "converted", "size_mb", "parameters", "instruct", "path"]],
                           "models"))


if __name__ == "__main__":  # pragma: no cover
    app()
