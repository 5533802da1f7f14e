"""The CLI as a user meets it: real subprocesses, exit codes and exact one-line errors."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from evalkit.cli import app

from .conftest import NURSERY_EXEMPLARS, write_jsonl


def evalkit(*args: str, cwd=None) -> subprocess.CompletedProcess:
    env = {**os.environ, "COLUMNS": "200", "HF_HUB_OFFLINE": "1"}
    return subprocess.run([sys.executable, "-m", "evalkit", *map(str, args)], capture_output=True, text=True,
                          env=env, cwd=cwd, timeout=120)


def test_check_ok(nursery):
    r = evalkit("check", nursery)
    assert r.returncode == 0, r.stderr
    assert "ok: task 'nursery', 6 questions, 5 exemplars, answer kind number" in r.stdout


@pytest.mark.parametrize("breakage, expected", [
    (lambda p: p.write_text(p.read_text().replace('name = "nursery"\n', "")), ": name: required field is missing"),
    (lambda p: p.write_text(p.read_text().replace('kind = "number"', 'kind = "number"\ntolerance = "wide"')),
     ": answer.tolerance: Input should be a valid number"),
    (lambda p: (p.parent.joinpath("t.j2").write_text("{{ question }}"),
                p.write_text(p.read_text() + '\n[templates]\nponder = "t.j2"\n')),
     ": templates: unknown style 'ponder'; styles are direct, worked, worked-zero"),
    (lambda p: write_jsonl(p.parent / "exemplars.jsonl", NURSERY_EXEMPLARS + [
        {"id": "e9", "question": "A seed nursery sows 12 trays with 8 seeds each. How many seeds?", "steps": "x", "answer": "96"}]),
     "exemplars.jsonl: exemplar 'e9' is also question 'n1' (same normalised text)"),
])
def test_check_broken_spec_one_line_exit_2(nursery, breakage, expected):
    breakage(nursery)
    r = evalkit("check", nursery)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("error: ") and expected in lines[0], lines[0]
    assert "Traceback" not in r.stderr


def test_debug_shows_traceback(nursery):
    nursery.write_text("name = ")
    r = evalkit("--debug", "check", nursery)
    assert r.returncode != 0 and "Traceback" in r.stderr


def test_run_unknown_model_writes_nothing(nursery, tmp_path):
    out = tmp_path / "never"
    r = evalkit("run", nursery, "--model", "no-such-model-here", "--out", out)
    assert r.returncode == 2, r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "no-such-model-here" in r.stderr
    assert "smollm2-135m" in r.stderr  # it lists the models it knows
    assert not out.exists()


def test_run_task_spec_needs_a_model(nursery):
    r = evalkit("run", nursery)
    assert r.returncode == 2 and "needs at least one --model" in r.stderr


def test_preview_plain_text(nursery):
    r = evalkit("preview", nursery, "--style", "direct", "--shots", "2", "--question", "n3")
    assert r.returncode == 0, r.stderr
    assert r.stdout.rstrip().endswith("There are 40 seedlings; 15 are moved to the greenhouse. How many are left?\nAnswer:")
    assert r.stdout.count("Question:") == 3


def test_every_command_has_help_text():
    import typer.main

    group = typer.main.get_command(app)
    assert group.commands, "no commands registered"
    for name, cmd in group.commands.items():
        assert cmd.help and cmd.help.strip(), f"command '{name}' has no help text"
        r = evalkit(name, "--help")
        assert r.returncode == 0 and "Usage" in r.stdout


def test_every_command_is_documented_in_readme():
    import pathlib

    import typer.main

    readme = (pathlib.Path(__file__).resolve().parent.parent / "README.md").read_text()
    for name in typer.main.get_command(app).commands:
        assert f"evalkit {name}" in readme, f"README does not mention 'evalkit {name}'"


@pytest.mark.parametrize("columns, cut", [(None, False), ("60", True)])
def test_piped_tables_are_not_cut_short(tmp_path, columns, cut):
    """Written to a pipe, rich would assume 80 columns and end long cells with an ellipsis;
    the CLI gives piped tables their natural width unless COLUMNS says otherwise."""
    env = {k: v for k, v in os.environ.items() if k != "COLUMNS"}
    env.update({"HF_HUB_OFFLINE": "1", "EVALKIT_CACHE": str(tmp_path / "cache")})
    if columns:
        env["COLUMNS"] = columns
    r = subprocess.run([sys.executable, "-m", "evalkit", "models"], capture_output=True, text=True,
                       env=env, timeout=120)
    assert r.returncode == 0, r.stderr
    assert ("…" in r.stdout) is cut, r.stdout
    if not cut:
        for name in ("smollm2-135m", "gemma3-270m", "converted", "parameters", "instruct"):
            assert name in r.stdout
        assert max(map(len, r.stdout.splitlines())) > 80
