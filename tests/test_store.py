"""The SQLite store: records committed one by one, resumable, and the generation cache."""

from __future__ import annotations

import sqlite3

import pytest

from evalkit.errors import StoreError
from evalkit.store import GenerationCache, Record, RunStore, cache_key


def _rec(cid="c1", qid="q1", **kw) -> Record:
    base = dict(condition_id=cid, question_id=qid, question="How many?", gold="3", grp=None, prompt_sha="abc",
                prompt="p", completion="The answer is 3.", extracted="3", extracted_raw="3", method="stated",
                correct=True, outcome="correct", prompt_tokens=10, new_tokens=5, seconds=0.1, min_margin=0.5,
                finish="eos", cached=False)
    return Record(**{**base, **kw})


def test_records_round_trip_and_resume(tmp_path):
    path = tmp_path / "store.sqlite"
    with RunStore(path) as s:
        s.add_condition("c1", "m | direct | 0-shot | draw 0", "t", "m", "direct", 0, 0, 0, {"a": 1})
        s.add_record(_rec(qid="q1"))
        s.add_record(_rec(qid="q2", correct=False, outcome="wrong"))
    with RunStore.open_run(tmp_path) as s:
        assert s.done_ids("c1") == {"q1", "q2"}
        df = s.records()
        assert list(df["question_id"]) == ["q1", "q2"]
        assert df["correct"].tolist() == [True, False]
        assert df["condition"].iloc[0].startswith("m | direct")


def test_condition_settings_must_match(tmp_path):
    with RunStore(tmp_path / "store.sqlite") as s:
        s.add_condition("c1", "l", "t", "m", "direct", 0, 0, 0, {"a": 1})
        s.add_condition("c1", "l", "t", "m", "direct", 0, 0, 0, {"a": 1})  # same: fine
        with pytest.raises(StoreError, match="other settings"):
            s.add_condition("c1", "l", "t", "m", "direct", 0, 0, 0, {"a": 2})


def test_open_missing_run(tmp_path):
    with pytest.raises(StoreError, match="no store here"):
        RunStore.open_run(tmp_path)


def test_a_failed_insert_leaves_nothing_half_written(tmp_path):
    with RunStore(tmp_path / "store.sqlite") as s:
        s.add_condition("c1", "l", "t", "m", "direct", 0, 0, 0, {})
        s.add_record(_rec(qid="q1"))
        with pytest.raises(sqlite3.Error):
            s.add_record(_rec(qid="q2", completion=None))  # NOT NULL violated inside the transaction
        assert s.done_ids("c1") == {"q1"}


def test_generation_cache(tmp_path):
    k1 = cache_key("sha", "float32", "prompt", 24, ["\nQ:"])
    assert k1 == cache_key("sha", "float32", "prompt", 24, ["\nQ:"])
    for other in (cache_key("sha2", "float32", "prompt", 24, ["\nQ:"]), cache_key("sha", "bfloat16", "prompt", 24, ["\nQ:"]),
                  cache_key("sha", "float32", "prompt!", 24, ["\nQ:"]), cache_key("sha", "float32", "prompt", 25, ["\nQ:"]),
                  cache_key("sha", "float32", "prompt", 24, [])):
        assert other != k1
    c = GenerationCache(tmp_path / "g.sqlite")
    assert c.get(k1) is None
    c.put(k1, "text", 3, 2, 0.25, "stop", 0.01, {"note": 1})
    got = GenerationCache(tmp_path / "g.sqlite").get(k1)
    assert got["completion"] == "text" and got["extra"] == {"note": 1} and len(c) == 1
