"""Task spec and study validation: every problem is one SpecError naming file and field."""

from __future__ import annotations

import pytest

from evalkit.data import load_task_data
from evalkit.errors import DataError, SpecError
from evalkit.spec import Study, load_study, load_task

from .conftest import NURSERY_EXEMPLARS, NURSERY_QUESTIONS, write_jsonl


def test_valid_spec_loads(nursery):
    spec = load_task(nursery)
    assert spec.name == "nursery"
    assert spec.answer.kind == "number" and spec.answer.tolerance == 0
    task = load_task_data(spec)
    assert [q.id for q in task.questions] == [q["id"] for q in NURSERY_QUESTIONS]
    assert task.questions[0].group == "trays"
    assert len(task.exemplars) == len(NURSERY_EXEMPLARS)


def _spec_error(path) -> SpecError:
    with pytest.raises(SpecError) as info:
        load_task(path)
    return info.value


def test_missing_field(nursery):
    nursery.write_text(nursery.read_text().replace('name = "nursery"\n', ""))
    e = _spec_error(nursery)
    assert e.field == "name" and "required field is missing" in str(e)
    assert str(nursery) in str(e)


def test_wrong_type(nursery):
    nursery.write_text(nursery.read_text().replace('kind = "number"', 'kind = "number"\ntolerance = "a lot"'))
    e = _spec_error(nursery)
    assert e.field == "answer.tolerance" and "number" in str(e)


def test_unknown_answer_kind(nursery):
    nursery.write_text(nursery.read_text().replace('kind = "number"', 'kind = "essay"'))
    e = _spec_error(nursery)
    assert e.field == "answer.kind" and "'essay'" in str(e)


def test_unknown_style_in_templates(nursery):
    (nursery.parent / "mine.j2").write_text("{{ question }}")
    nursery.write_text(nursery.read_text() + '\n[templates]\nreasoned = "mine.j2"\n')
    e = _spec_error(nursery)
    assert e.field == "templates" and "unknown style 'reasoned'" in str(e)


def test_unknown_field_is_named(nursery):
    nursery.write_text(nursery.read_text().replace('[answer]', 'colour = "blue"\n[answer]'))
    e = _spec_error(nursery)
    assert e.field == "exemplars.colour" and "unknown field" in str(e)


def test_missing_data_file(nursery):
    (nursery.parent / "questions.jsonl").unlink()
    e = _spec_error(nursery)
    assert e.field == "questions.path" and "not found" in str(e)


def test_both_path_and_hub(nursery):
    nursery.write_text(nursery.read_text().replace('path = "questions.jsonl"', 'path = "questions.jsonl"\nhub = "org/set"'))
    e = _spec_error(nursery)
    assert e.field == "questions" and "exactly one" in str(e)


def test_not_toml(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("name = [unclosed")
    assert "not valid TOML" in str(_spec_error(p))


def test_exemplar_leak_is_an_error(nursery):
    leaked = dict(NURSERY_EXEMPLARS[0], id="e9", question="  a seed NURSERY sows 12 trays with 8 seeds each.  How many seeds? ")
    write_jsonl(nursery.parent / "exemplars.jsonl", NURSERY_EXEMPLARS + [leaked])
    with pytest.raises(DataError, match="exemplar 'e9' is also question 'n1'"):
        load_task_data(load_task(nursery))


def test_duplicate_ids(nursery):
    write_jsonl(nursery.parent / "questions.jsonl", NURSERY_QUESTIONS + [dict(NURSERY_QUESTIONS[0], question="other")])
    with pytest.raises(DataError, match="id 'n1' appears twice"):
        load_task_data(load_task(nursery))


def test_empty_gold_names_the_row(nursery):
    rows = [dict(q) for q in NURSERY_QUESTIONS]
    rows[2]["answer"] = ""
    write_jsonl(nursery.parent / "questions.jsonl", rows)
    with pytest.raises(DataError, match="row 3: field 'answer'"):
        load_task_data(load_task(nursery))


def test_csv_and_parquet_sources(nursery):
    import pandas as pd

    folder = nursery.parent
    pd.DataFrame(NURSERY_QUESTIONS).to_csv(folder / "q.csv", index=False)
    pd.DataFrame(NURSERY_EXEMPLARS).to_parquet(folder / "e.parquet")
    nursery.write_text(nursery.read_text().replace("questions.jsonl", "q.csv").replace("exemplars.jsonl", "e.parquet"))
    task = load_task_data(load_task(nursery))
    assert [q.answer for q in task.questions] == [q["answer"] for q in NURSERY_QUESTIONS]
    assert task.exemplars[2].steps.startswith("4 * 2 = 8")


def test_hub_source_offline_fails_fast(nursery, monkeypatch):
    import time

    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    nursery.write_text(nursery.read_text().replace('path = "questions.jsonl"', 'hub = "someone/nursery-questions"'))
    t = time.perf_counter()
    with pytest.raises(DataError, match="hub dataset 'someone/nursery-questions'"):
        load_task_data(load_task(nursery))
    assert time.perf_counter() - t < 10


def test_study_validation(tmp_path, nursery):
    study = tmp_path / "study.toml"
    study.write_text(f'tasks = ["{nursery}"]\nmodels = ["m"]\nstyles = ["direct", "pondering"]\n')
    with pytest.raises(SpecError) as info:
        load_study(study)
    assert info.value.field == "styles" and "unknown style 'pondering'" in str(info.value)
    study.write_text(f'tasks = ["{nursery}"]\nmodels = ["m"]\nshots = [8, 2, 2]\n[decoding]\nmax_new_tokens = {{ worked = 64 }}\n')
    s = load_study(study)
    assert s.shots == [2, 8] and s.decoding.limit("worked") == 64 and s.decoding.limit("direct") == 24


def test_condition_ids_are_stable():
    from evalkit.spec import Condition

    a = Condition(task="t", model="m", style="worked", shots=4, draw=0, seed=0)
    b = Condition(task="t", model="m", style="worked", shots=4, draw=1, seed=0)
    assert a.id == Condition(**a.model_dump()).id and a.id != b.id
    assert isinstance(Study(tasks=["x"], models=["m"]).decoding.stop, list)
