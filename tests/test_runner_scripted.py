"""The runner end to end with a scripted backend: store, cache, resume, exports, report."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from evalkit import api
from evalkit.backends.scripted import ScriptedBackend
from evalkit.errors import StoreError
from evalkit.run import load_run

from .conftest import NURSERY_QUESTIONS

# worked completions are right on even-numbered questions; direct ones only on n1
SCRIPT = {}
for i, q in enumerate(NURSERY_QUESTIONS):
    SCRIPT[q["question"]] = q["answer"] if i == 0 else "7"


def worked_script(prompt: str) -> str:
    q = next(x for x in NURSERY_QUESTIONS if prompt.rstrip().endswith(x["question"] + "\nSolution:"))
    i = NURSERY_QUESTIONS.index(q)
    answer = q["answer"] if i % 2 == 0 else "1"
    return f"Counting carefully, 2 + 2 = 4. The answer is {answer}.\nQuestion: something else"


def factory(model, study):
    def script(prompt: str) -> str:
        if prompt.rstrip().endswith("Solution:"):
            return worked_script(prompt)
        q = next(x for x in NURSERY_QUESTIONS if prompt.rstrip().endswith(x["question"] + "\nAnswer:"))
        return " " + SCRIPT[q["question"]] + "\n"
    return ScriptedBackend(script, name=model)


@pytest.fixture
def study(nursery):
    return api.study_for(nursery, models=["scripted-a"], styles=["direct", "worked"], shots=[2])


def test_run_writes_a_complete_run_folder(study, tmp_path):
    run = api.run(study, out=tmp_path / "run", backend_factory=factory, progress=False)
    folder = tmp_path / "run"
    for name in ("store.sqlite", "manifest.json", "records.csv", "records.parquet", "report.md"):
        assert (folder / name).is_file(), name
    assert len(run.records) == 2 * len(NURSERY_QUESTIONS)
    acc = run.summary.set_index("style")["accuracy"]
    assert acc["direct"] == pytest.approx(1 / 6) and acc["worked"] == pytest.approx(3 / 6)
    # the stop string cut the worked completion before the next "Question:"
    assert not run.records["completion"].str.contains("something else").any()
    assert (run.records.loc[run.records["style"] == "worked", "method"] == "stated").all()
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["study"]["models"] == ["scripted-a"]
    assert manifest["tasks"][0]["spec_sha256"] and manifest["tasks"][0]["templates"]["worked"]["sha256"]
    assert manifest["models"]["scripted-a"]["backend"] == "scripted"
    assert "torch" in manifest["packages"] and manifest["machine"]["cpu_count"]
    pq = pd.read_parquet(folder / "records.parquet")
    assert pq["completion"].tolist() == run.records["completion"].tolist()
    report = (folder / "report.md").read_text()
    assert "95% Wilson" in report and "| scripted-a | worked | 2 |" in report


def test_second_run_uses_cache_and_matches(study, tmp_path):
    first = api.run(study, out=tmp_path / "a", backend_factory=factory, progress=False)
    calls = []

    def counting(model, s):
        b = factory(model, s)
        calls.append(b)
        return b

    second = api.run(study, out=tmp_path / "b", backend_factory=counting, progress=False)
    assert second.counts["cached"] == len(second.records) and second.counts["generated"] == 0
    assert calls[0].calls == []  # nothing reached the model
    cols = ["condition", "question_id", "prompt_sha", "completion", "extracted", "correct"]
    pd.testing.assert_frame_equal(first.records[cols], second.records[cols])


def test_resume_skips_finished_records(study, tmp_path):
    folder = tmp_path / "run"

    class Interrupt(Exception):
        pass

    def dying(model, s):
        b = factory(model, s)
        real = b.generate

        def generate(prompts, **kw):
            def on_result(i, c):
                if i == 3:
                    raise Interrupt()
                kw["on_result"](i, c)
            return real(prompts, max_new_tokens=kw["max_new_tokens"], stop=kw["stop"], on_result=on_result)
        b.generate = generate
        return b

    with pytest.raises(Interrupt):
        api.run(study, out=folder, backend_factory=dying, use_cache=False, progress=False)
    partial = load_run(folder)  # an interrupted run folder is readable: its finished records are there
    assert len(partial.records) == 3
    run = api.run(study, out=folder, backend_factory=factory, use_cache=False, progress=False)
    assert run.counts["resumed"] == 3 and len(run.records) == 12
    assert run.records.duplicated(["condition_id", "question_id"]).sum() == 0


def test_resume_with_other_study_is_refused(study, nursery, tmp_path):
    api.run(study, out=tmp_path / "run", backend_factory=factory, progress=False)
    other = api.study_for(nursery, models=["scripted-a"], styles=["direct"], shots=[1])
    with pytest.raises(StoreError, match="different study"):
        api.run(other, out=tmp_path / "run", backend_factory=factory, progress=False)


def test_zero_shot_styles_have_one_draw(nursery):
    from evalkit.runner import expand

    s = api.study_for(nursery, models=["m"], styles=["direct", "worked-zero"], shots=[0, 2], draws=3)
    conds = [(p.condition.style, p.condition.shots, p.condition.draw) for p in expand(s)]
    assert conds == [("direct", 0, 0), ("direct", 2, 0), ("direct", 2, 1), ("direct", 2, 2), ("worked-zero", 0, 0)]


def test_diff_and_rerun(study, tmp_path):
    from evalkit.rundiff import diff_runs, rerun

    a = api.run(study, out=tmp_path / "a", backend_factory=factory, progress=False)

    def changed(model, s):  # a "new model version": n3 now right in direct style
        b = factory(model, s)
        inner = b.script

        def script(prompt):
            if prompt.rstrip().endswith(NURSERY_QUESTIONS[2]["question"] + "\nAnswer:"):
                return " 25"
            return inner(prompt)
        b.script = script
        return b

    api.run(study, out=tmp_path / "b", backend_factory=changed, use_cache=False, progress=False)
    d = diff_runs(tmp_path / "a", tmp_path / "b")
    assert len(d.matched) == 12 and d.only_a == d.only_b == 0
    assert d.changed["question_id_a"].tolist() == ["n3"]
    assert (d.changed["outcome_a"].iloc[0], d.changed["outcome_b"].iloc[0]) == ("wrong", "correct")
    assert d.text_changed == 1 and "1 changed outcome (wrong → correct: 1)" in d.summary()
    direct = d.comparisons.set_index("setting").loc["nursery | scripted-a | direct | 2-shot | draw 0"]
    assert direct["difference"] == pytest.approx(1 / 6)

    same = rerun(tmp_path / "a", out=tmp_path / "again", backend_factory=factory, progress=False)
    assert same.identical and same.compared == len(a.records) and "byte for byte" in same.summary()
    other = rerun(tmp_path / "a", out=tmp_path / "other", backend_factory=changed, progress=False)
    assert not other.identical and len(other.differing) == 1


def test_tie_note_counts_in_words():
    from evalkit.report.markdown import tie_note

    assert tie_note(1).startswith("1 record met a near-tie") and "its completion may change" in tie_note(1)
    assert tie_note(3).startswith("3 records met a near-tie") and "their completions may change" in tie_note(3)
