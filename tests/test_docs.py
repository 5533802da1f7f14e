"""Checks that keep the user documentation in docs/ true to the code.

The examples tables in the docs are run through the library here, so an example that stops
being true fails a test instead of misleading a reader. Only the standard library parses the
Markdown; cells holding Python string or list literals are read with ast.literal_eval (a
literal parser, nothing is executed).
"""

from __future__ import annotations

import ast
import re
import tomllib
from fractions import Fraction
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
README = ROOT / "README.md"
DOC_FILES = ["ANSWERS.md", "AUDIT.md", "STATISTICS.md", "REPORTS.md", "STUDIES.md"]


def _read(name: str) -> str:
    return (DOCS / name).read_text(encoding="utf-8")


def _cells(line: str) -> list[str]:
    """The cells of one Markdown table row; ``\\|`` is a literal bar, as in GitHub's tables."""
    body = line.strip()
    body = body[1:] if body.startswith("|") else body
    body = body[:-1] if body.endswith("|") and not body.endswith("\\|") else body
    return [c.strip().replace("\\|", "|") for c in re.split(r"(?<!\\)\|", body)]


def tables(text: str) -> list[tuple[list[str], list[list[str]], str]]:
    """Every Markdown table in ``text``: (header cells, body rows, the heading it sits under)."""
    out, lines, heading, i, fenced = [], text.splitlines(), "", 0, False
    while i < len(lines):
        line = lines[i]
        if line.startswith("```"):
            fenced = not fenced
        if fenced:
            i += 1
            continue
        if line.startswith("#"):
            heading = line.lstrip("#").strip()
        if line.lstrip().startswith("|") and i + 1 < len(lines) and re.fullmatch(
                r"\s*\|?\s*:?-{3,}:?\s*(\|\s*:?-{3,}:?\s*)*\|?\s*", lines[i + 1]):
            header, rows, i = _cells(line), [], i + 2
            while i < len(lines) and lines[i].lstrip().startswith("|"):
                rows.append(_cells(lines[i]))
                i += 1
            out.append((header, rows, heading))
            continue
        i += 1
    return out


def table_with(text: str, header: list[str]) -> list[list[str]]:
    """The body rows of the one table whose header is exactly ``header``."""
    found = [rows for h, rows, _ in tables(text) if h == header]
    assert len(found) == 1, f"expected one table with header {header}, found {len(found)}"
    assert found[0], f"the table with header {header} has no rows"
    return found[0]


def code(cell: str) -> str:
    """The content of a cell that is one backticked code span."""
    m = re.fullmatch(r"`(.*)`", cell)
    assert m, f"cell {cell!r} is not one code span"
    return m.group(1)


def literal(cell: str):
    return ast.literal_eval(code(cell))


def none_or_code(cell: str) -> str | None:
    return None if cell in ("—", "-", "") else code(cell)


# --- the docs exist and are reachable ------------------------------------------------------

@pytest.mark.parametrize("name", DOC_FILES)
def test_doc_exists_and_has_a_title(name):
    text = _read(name)
    assert text.startswith("# "), f"docs/{name} should open with a title"
    assert len(text) > 2000, f"docs/{name} looks empty"


def test_readme_links_docs():
    links = re.findall(r"\]\((docs/[^)#\s]*)", README.read_text(encoding="utf-8"))
    assert links, "README.md has no Markdown link into docs/"


def _anchors(path: Path) -> set[str]:
    """GitHub's anchors for a Markdown file's headings: lower case, punctuation dropped, spaces to hyphens."""
    out, fenced = set(), False
    for line in path.read_text(encoding="utf-8").splitlines():
        fenced = fenced != line.startswith("```")
        if not fenced and re.match(r"#{1,6} ", line):
            out.add(re.sub(r"[^\w\- ]", "", line.lstrip("#").strip().lower()).replace(" ", "-"))
    return out


@pytest.mark.parametrize("name", ["README.md", *(f"docs/{n}" for n in DOC_FILES)])
def test_relative_links_resolve(name):
    path = ROOT / name
    for target, anchor in re.findall(r"\]\(([^)#\s]*)(?:#([^)\s]*))?\)", path.read_text(encoding="utf-8")):
        if re.match(r"[a-z]+:", target):
            continue
        linked = path.parent / target if target else path
        assert linked.exists(), f"{name} links {target}, which does not exist"
        if anchor and linked.suffix == ".md":
            assert anchor in _anchors(linked), f"{name} links {target}#{anchor}, which has no such heading"


# --- CLI commands ----------------------------------------------------------------------------

def _commands() -> list[str]:
    import typer.main

    from evalkit.cli import app

    return sorted(typer.main.get_command(app).commands)


def test_every_command_is_in_the_readme():
    readme = README.read_text(encoding="utf-8")
    missing = [c for c in _commands() if f"evalkit {c}" not in readme]
    assert not missing, f"README.md does not mention: {', '.join('evalkit ' + c for c in missing)}"


def test_every_command_is_in_some_doc():
    docs = "\n".join(_read(n) for n in DOC_FILES)
    missing = [c for c in _commands() if f"evalkit {c}" not in docs]
    assert not missing, f"no docs/*.md file mentions: {', '.join('evalkit ' + c for c in missing)}"


# --- ANSWERS.md: the examples table ----------------------------------------------------------

def test_answer_examples_extract_as_documented():
    from evalkit.answers import extract_answer

    rows = table_with(_read("ANSWERS.md"), ["kind", "choices", "completion", "value", "method"])
    assert len(rows) >= 20
    for kind, choices, completion, value, method in rows:
        text = literal(completion)
        opts = None if choices in ("—", "-") else literal(choices)
        got = extract_answer(text, kind, opts)
        assert (got.value, got.method) == (none_or_code(value), code(method)), f"ANSWERS.md example {text!r}"


# --- AUDIT.md: verdict names, steps and verdict examples -----------------------------------

def test_every_verdict_is_documented():
    from evalkit.audit import Verdict

    audit = _read("AUDIT.md")
    missing = [v.value for v in Verdict if f"`{v.value}`" not in audit]
    assert not missing, f"docs/AUDIT.md does not name the verdicts {missing}"


def test_step_examples_are_found_as_documented():
    from evalkit.numbers import format_value
    from evalkit.steps import find_steps

    rows = table_with(_read("AUDIT.md"), ["text", "steps found (expression = claimed)", "holds"])
    assert len(rows) >= 15
    for text_cell, steps_cell, holds_cell in rows:
        text = literal(text_cell)
        steps = find_steps(text)
        got = [f"{s.expression} = {format_value(s.claimed)}" for s in steps]
        want = [] if steps_cell == "none" else [code(c.strip()) for c in steps_cell.split(";")]
        assert got == want, f"AUDIT.md step example {text!r}"
        want_holds = [] if holds_cell in ("—", "-") else [h.strip() == "yes" for h in holds_cell.split(";")]
        assert [s.holds for s in steps] == want_holds, f"AUDIT.md step example {text!r}"


def test_verdict_examples_classify_as_documented():
    from evalkit.answers import extract_answer, parse_number
    from evalkit.audit import Verdict, classify_chain

    rows = table_with(_read("AUDIT.md"), ["chain", "gold", "extracted", "verdict"])
    seen = set()
    for chain_cell, gold_cell, extracted_cell, verdict_cell in rows:
        chain = literal(chain_cell)
        ex = extract_answer(chain).value  # as evalkit audit reads a record
        assert ex == none_or_code(extracted_cell), f"AUDIT.md verdict example {chain!r}"
        answer = None if ex is None else parse_number(ex)
        got = classify_chain(chain, answer, Fraction(code(gold_cell)))
        assert got.verdict.value == code(verdict_cell), f"AUDIT.md verdict example {chain!r}: {got.explanation}"
        seen.add(got.verdict)
    assert seen == set(Verdict), f"AUDIT.md lacks an example of {set(Verdict) - seen}"


# --- STATISTICS.md: its worked examples ----------------------------------------------------

def test_statistics_examples_run_as_shown():
    import doctest

    result = doctest.testfile(str(DOCS / "STATISTICS.md"), module_relative=False, verbose=False,
                              optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 10
    assert result.failed == 0, "an example in docs/STATISTICS.md no longer gives the output shown (see above)"


# --- STUDIES.md: every spec field, with its default ----------------------------------------

def _spec_models():
    from evalkit import spec

    return [spec.TaskSpec, spec.SourceSpec, spec.QuestionSource, spec.ExemplarSource, spec.AnswerSpec,
            spec.Study, spec.Decoding]


def _field_tables() -> list[tuple[list[type], dict[str, list[str]]]]:
    """Each field table (header field | type | default | ...): the spec classes its heading names, and its rows."""
    classes = {m.__name__: m for m in _spec_models()}
    out = []
    for header, rows, heading in tables(_read("STUDIES.md")):
        if header[:3] != ["field", "type", "default"]:
            continue
        named = [classes[n] for n in re.findall(r"`(\w+)`", heading) if n in classes]
        assert named, f"STUDIES.md: the field table under {heading!r} names no spec class in backticks"
        out.append((named, {code(r[0]): r for r in rows}))
    return out


def test_every_spec_field_is_documented():
    studies = _read("STUDIES.md")
    found = _field_tables()
    for model in _spec_models():
        documented = {f for named, rows in found if model in named for f in rows}
        for name in model.model_fields:
            assert f"`{name}`" in studies, f"docs/STUDIES.md does not mention {model.__name__}.{name}"
            assert name in documented, f"docs/STUDIES.md: no field table under a heading naming `{model.__name__}` lists {name}"
    for named, rows in found:
        for name in rows:
            assert any(name in m.model_fields for m in named), \
                f"docs/STUDIES.md documents a field {name!r} that {', '.join(m.__name__ for m in named)} do not have"


def _documented_default(cell: str):
    """A default cell: 'required', 'none', a TOML value in backticks, or 'see ...' for a nested table."""
    if cell == "required":
        return "required"
    if cell == "none":
        return None
    if cell.startswith("see "):
        return "table"
    return tomllib.loads("x = " + code(cell))["x"]


def test_documented_defaults_match_the_models():
    from pydantic import BaseModel

    checked = 0
    for named, rows in _field_tables():
        for model in named:
            for name, info in model.model_fields.items():
                if name not in rows:
                    continue
                want = _documented_default(rows[name][2])
                where = f"STUDIES.md: {model.__name__}.{name}"
                if info.is_required():
                    assert want == "required", f"{where} is required, docs say {want!r}"
                    continue
                default = info.get_default(call_default_factory=True)
                if isinstance(default, BaseModel):
                    assert want == "table", f"{where} defaults to a table; write 'see ...'"
                else:
                    assert want == default, f"{where} defaults to {default!r}, docs say {want!r}"
                checked += 1
    assert checked >= 25
