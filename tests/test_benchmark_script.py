"""The runner benchmark runs end to end (a real process) on a tiny model built from a config.

Its speed figures mean nothing on a tiny model and are not checked; what is checked is that
the script keeps working: every section is printed, and the three methods' completions are
compared with the engine's (plain and batched ``generate`` are the outside reference).
"""

from __future__ import annotations

import importlib.util
import re
import subprocess
import sys
from pathlib import Path

import torch
from torch.utils.flop_counter import FlopCounterMode
from transformers import AutoModelForCausalLM

from .tiny import build_tiny_model

ROOT = Path(__file__).resolve().parents[1]


def test_benchmark_quick_run_prints_every_section(tmp_path):
    folder = build_tiny_model(tmp_path / "tiny", arch="llama", seed=0)
    proc = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "runner_speed.py"),
                           "--model-folder", str(folder), "--quick"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    for heading in ("Machine: memory read", "Engine's linear layers:", "| style | method |", "| decode batch |",
                    "| style | prefix | own tokens |", "| direct shots |", "bfloat16 items/s", "Peak resident memory",
                    "Other processes used"):
        assert heading in out, heading
    for style in ("direct", "worked"):
        rows = [line for line in out.splitlines()
                if line.startswith(f"| {style} | ") and line.count("|") == 9]
        assert [r.split("|")[2].strip()[:5] for r in rows] == ["plain", "batch", "evalk"], rows
        # Same text as the engine: a/b with b the number of items that method ran.
        same = [line.rstrip(" |").rsplit("|", 1)[1].strip() for line in rows]
        assert all("/" in s for s in same), same
    # The engine's repeated runs (interleaved with the baselines) are listed, with the spread
    # of its speed-ups, and checked against each other.
    for style in ("direct", "worked"):
        note = [line for line in out.splitlines() if line.startswith(f"- {style}: the engine's runs took")]
        assert len(note) == 1 and "every run gave the same completions" in note[0], note
    # Decode table: the bandwidth bound is per row of the batch (a step reads the weights once
    # for all rows), so each share is tokens/s over batch x the per-row bound printed below it.
    per_row = float(re.search(r"bandwidth bound: .*?, ([\d.]+) tokens/s per row of the batch", out).group(1))
    decode_row = re.compile(r"\| \d+ \| [\d.]+ \| [\d.]+ \| [\d.]+% \| [\d.]+% \|")
    decode = [line.split("|")[1:6] for line in out.splitlines() if decode_row.fullmatch(line)]
    assert [int(b) for b, *_ in decode] == [1, 8], decode
    for batch, rate, _, _, share in decode:
        expected = 100 * float(rate) / (int(batch) * per_row)
        assert abs(float(share.strip(" %")) - expected) <= 0.05 + 0.002 * expected, (batch, rate, share, per_row)
    # Peak memory is traced part by part; the figures never fall (it is the peak so far).
    peak = next(line for line in out.splitlines() if line.startswith("Peak resident memory"))
    parts = re.findall(r"(direct timings|worked timings|decode table|shots table|bfloat16) (\d+)", peak)
    assert [p for p, _ in parts] == ["direct timings", "worked timings", "decode table", "shots table", "bfloat16"]
    mbs = [int(mb) for _, mb in parts]
    assert mbs == sorted(mbs) and mbs[0] > 0
    # Either all texts agreed, or each difference is listed with its near-tie count.
    assert "Every completion of every method equals the engine's" in out or "completion(s) differ" in out


def _script():
    spec = importlib.util.spec_from_file_location("runner_speed", ROOT / "benchmarks" / "runner_speed.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_linear_flops_per_token_match_torchs_flop_counter(tmp_path):
    """The bound's per-token count of the linear layers' FLOPs equals what torch's own FLOP
    counter (torch.utils.flop_counter) records for those modules in a real forward pass."""
    folder = build_tiny_model(tmp_path / "tiny", arch="llama", seed=0)
    model = AutoModelForCausalLM.from_pretrained(folder).eval()
    body, head = _script().linear_flops_per_token(model)
    T = 7
    counter = FlopCounterMode(display=False)
    with torch.inference_mode(), counter:
        model(input_ids=torch.arange(T)[None] % model.config.vocab_size)  # logits for every position
    counts = counter.get_flop_counts()
    linear_names = {name for name, m in model.named_modules() if isinstance(m, torch.nn.Linear)}
    counted = {k: sum(v.values()) for k, v in counts.items()
               if k.split(".", 1)[-1] in linear_names and k != "Global"}
    assert len(counted) == len(linear_names)
    assert sum(counted.values()) == T * (body + head)
