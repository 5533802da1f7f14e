"""The whole pipeline on real tiny models built from a config: CLI runs, resume after a real
SIGKILL, reproduction from the manifest, and the FLOPs estimate."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from .conftest import NURSERY_EXEMPLARS, NURSERY_QUESTIONS, SPEC, write_jsonl
from .tiny import build_tiny_model


@pytest.fixture(scope="module")
def tiny(tmp_path_factory) -> Path:
    return build_tiny_model(tmp_path_factory.mktemp("tiny") / "model", arch="llama", seed=3, chat=True)


@pytest.fixture(scope="module")
def task(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("task")
    # more questions than the fixture, so a run lasts long enough to be killed part-way
    qs = [dict(q, id=f"{q['id']}-{k}", question=f"{q['question']} (crate {k})") for k in range(4) for q in NURSERY_QUESTIONS]
    write_jsonl(folder / "questions.jsonl", qs)
    write_jsonl(folder / "exemplars.jsonl", NURSERY_EXEMPLARS)
    (folder / "nursery.toml").write_text(SPEC)
    return folder / "nursery.toml"


def _env(tmp_path: Path) -> dict:
    return {**os.environ, "COLUMNS": "200", "HF_HUB_OFFLINE": "1",
            "EVALKIT_GENERATION_CACHE": str(tmp_path / "cache.sqlite")}


def _study(tmp_path: Path, task: Path, tiny: Path) -> Path:
    p = tmp_path / "study.toml"
    p.write_text(f'name = "tiny"\ntasks = ["{task}"]\nmodels = ["{tiny}"]\nstyles = ["direct", "worked", "worked-zero"]\n'
                 f'shots = [0, 2]\ndraws = 2\nlimit = 12\n[decoding]\nmax_new_tokens = {{ direct = 8, worked = 40, "worked-zero" = 40 }}\n'
                 f'batch_size = 4\nthreads = 1\n')
    return p


def _records(folder: Path) -> pd.DataFrame:
    cols = ["condition", "question_id", "prompt_sha", "completion", "extracted", "correct", "new_tokens", "finish"]
    df = pd.read_parquet(folder / "records.parquet")[cols]
    return df.sort_values(["condition", "question_id"]).reset_index(drop=True)


def test_study_run_kill_resume_and_rerun(tmp_path, task, tiny):
    study = _study(tmp_path, task, tiny)
    env = _env(tmp_path)
    full = subprocess.run([sys.executable, "-m", "evalkit", "run", str(study), "--out", str(tmp_path / "full"), "--no-cache"],
                          capture_output=True, text=True, env=env, timeout=600)
    assert full.returncode == 0, full.stderr
    # Progress goes to stderr, so stdout holds the results alone (a redirected run stays clean).
    assert "items/s" in full.stderr and "items/s" not in full.stdout, (full.stdout, full.stderr)
    assert "accuracy per condition" in full.stdout
    expected = _records(tmp_path / "full")
    # direct 0-shot, direct 2-shot x 2 draws, worked 0-shot, worked 2-shot x 2 draws, worked-zero: 7 conditions
    assert expected["condition"].nunique() == 7 and len(expected) == 7 * 12

    # the same study, killed with SIGKILL once some records are committed, then resumed
    out = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "evalkit", "run", str(study), "--out", str(out), "--no-cache"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    deadline = time.time() + 300
    done = 0
    while time.time() < deadline and proc.poll() is None:
        time.sleep(0.2)
        try:
            with sqlite3.connect(out / "store.sqlite", timeout=1) as con:
                done = con.execute("SELECT COUNT(*) FROM records").fetchone()[0]
        except sqlite3.Error:
            continue
        if done >= 20:
            proc.send_signal(signal.SIGKILL)
            break
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL, "the run finished before it could be killed"
    with sqlite3.connect(out / "store.sqlite") as con:
        partial = con.execute("SELECT COUNT(*) FROM records").fetchone()[0]
        # every committed record is whole: no empty completion fields, nothing half-written
        assert con.execute("SELECT COUNT(*) FROM records WHERE prompt_sha = '' OR outcome = ''").fetchone()[0] == 0
    assert 20 <= partial < len(expected)
    resumed = subprocess.run([sys.executable, "-m", "evalkit", "run", str(study), "--out", str(out), "--no-cache"],
                             capture_output=True, text=True, env=env, timeout=600)
    assert resumed.returncode == 0, resumed.stderr
    assert f"{partial} already in the store" in resumed.stdout
    pd.testing.assert_frame_equal(_records(out), expected)

    # reproduction from the manifest, byte for byte
    again = subprocess.run([sys.executable, "-m", "evalkit", "rerun", str(tmp_path / "full"), "--out", str(tmp_path / "again")],
                           capture_output=True, text=True, env=env, timeout=600)
    assert again.returncode == 0, again.stdout + again.stderr
    assert f"identical: all {len(expected)} records reproduced byte for byte" in again.stdout
    # the HTML and Markdown reports exist and name every condition
    html = (tmp_path / "full" / "report.html").read_text()
    for c in expected["condition"].unique():
        assert c in html


def test_cache_makes_second_run_free_and_identical(tmp_path, task, tiny):
    env = _env(tmp_path)
    args = [sys.executable, "-m", "evalkit", "run", str(task), "-m", str(tiny), "-s", "direct", "-s", "worked",
            "-k", "2", "--limit", "6", "--threads", "1"]
    first = subprocess.run(args + ["--out", str(tmp_path / "one")], capture_output=True, text=True, env=env, timeout=600)
    assert first.returncode == 0, first.stderr
    second = subprocess.run(args + ["--out", str(tmp_path / "two")], capture_output=True, text=True, env=env, timeout=600)
    assert second.returncode == 0, second.stderr
    assert "12 records (0 generated, 12 from the cache" in second.stdout
    pd.testing.assert_frame_equal(_records(tmp_path / "one"), _records(tmp_path / "two"))


def test_flops_estimate_matches_hand_count(tiny):
    """Non-embedding parameters of a llama config, counted by hand from the architecture."""
    import json

    from transformers import AutoModelForCausalLM

    from evalkit.compute import forward_flops, non_embedding_parameters

    cfg = json.loads((tiny / "config.json").read_text())
    h, layers, heads, kv = cfg["hidden_size"], cfg["num_hidden_layers"], cfg["num_attention_heads"], cfg["num_key_value_heads"]
    inter, d = cfg["intermediate_size"], cfg["hidden_size"] // cfg["num_attention_heads"]
    attention = h * heads * d + 2 * h * kv * d + heads * d * h      # q, k, v, o projections (no biases)
    mlp = 3 * h * inter                                            # gate, up, down
    norms = 2 * h                                                  # two RMSNorm weights per layer
    expected = layers * (attention + mlp + norms) + h              # plus the final norm
    model = AutoModelForCausalLM.from_pretrained(tiny)
    assert non_embedding_parameters(model) == expected
    assert forward_flops(expected, 1000) == 2 * expected * 1000


def test_busy_machine_is_warned_and_reported(tmp_path, task, tiny):
    """With another process keeping a core busy, the run says so (one warning line on stderr,
    a sentence in both reports, the load in the manifest); the records are not affected."""
    import json

    spin = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        time.sleep(0.5)
        args = [sys.executable, "-m", "evalkit", "run", str(task), "-m", str(tiny), "-s", "direct", "-k", "2",
                "--limit", "6", "--threads", "1", "--no-cache", "--out", str(tmp_path / "busy")]
        r = subprocess.run(args, capture_output=True, text=True, env=_env(tmp_path), timeout=600)
    finally:
        spin.kill()
        spin.wait()
    assert r.returncode == 0, r.stderr
    lines = [line for line in r.stderr.splitlines() if line.startswith("warning: other processes kept")]
    assert any("on average during the run" in line for line in lines), r.stderr
    session = json.loads((tmp_path / "busy" / "manifest.json").read_text())["last_session"]
    assert session["other_processes_cores"] >= 0.5, session
    assert "**Busy machine:** Other processes kept" in (tmp_path / "busy" / "report.md").read_text()
    assert "Busy machine:</strong> Other processes kept" in (tmp_path / "busy" / "report.html").read_text()
