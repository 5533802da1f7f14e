"""Integration: the real SmolLM2-135M-Instruct (packaged GGUF) through the CLI on demo questions."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from evalkit.api import DEMO_TASK

pytestmark = pytest.mark.slow

SMOLLM2_SHA256 = "b179c9523d0e6a0f98a330c7562b682750a6f8c8c15e5bc70ea373728110db53"  # from the registry wheel


def test_smollm2_direct_and_worked_through_the_cli(tmp_path):
    study = tmp_path / "study.toml"
    study.write_text(f'name = "smoke"\ntasks = ["{DEMO_TASK}"]\nmodels = ["smollm2-135m"]\nstyles = ["direct", "worked"]\n'
                     'shots = [2]\nlimit = 4\n[decoding]\nmax_new_tokens = { direct = 16, worked = 64 }\n')
    env = {**os.environ, "COLUMNS": "200", "EVALKIT_GENERATION_CACHE": str(tmp_path / "cache.sqlite")}
    out = tmp_path / "run"
    r = subprocess.run([sys.executable, "-m", "evalkit", "run", str(study), "--out", str(out)],
                       capture_output=True, text=True, env=env, timeout=1200)
    assert r.returncode == 0, r.stderr[-3000:]
    assert "accuracy per condition" in r.stdout and "8 records (8 generated" in r.stdout
    for name in ("store.sqlite", "manifest.json", "records.csv", "records.parquet", "report.md", "report.html"):
        assert (out / name).is_file(), name
    manifest = json.loads((out / "manifest.json").read_text())
    model = manifest["models"]["smollm2-135m"]
    assert model["sha256"] == SMOLLM2_SHA256 and model["chat_template"] and model["dtype"] == "float32"
    assert model["threads"] >= 1 and manifest["machine"]["torch_threads"] >= 1
    records = pd.read_parquet(out / "records.parquet")
    assert len(records) == 8 and set(records["style"]) == {"direct", "worked"}
    # the chat template wrapped the few-shot text; stop strings cut every completion before a new question
    assert records["prompt"].str.contains("<|im_start|>assistant", regex=False).all()
    assert not records["completion"].str.contains("\nQuestion:", regex=False).any()
    assert records["method"].isin(["stated", "last-number", "none"]).all()
    assert (records["new_tokens"] > 0).all() and records["min_margin"].notna().all()
    report = (out / "report.md").read_text()
    assert "| smollm2-135m | worked | 2 |" in report and "95% Wilson" in report
