"""The engine on the real SmolLM2-135M-Instruct against one-at-a-time ``generate`` (slow).

Outside reference: transformers' ``generate`` (greedy), one prompt at a time. Prompts are
few-shot prompts from the bundled workshop task, wrapped in the model's own chat template,
in the direct style (answers only) and the worked style (worked solutions).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from evalkit.backends.engine import TIE_MARGIN, greedy_generate
from evalkit.backends.reference import reference_generate

pytestmark = pytest.mark.slow

TASK = Path(__file__).resolve().parents[1] / "task_specs" / "workshop"


def _rows(name: str) -> list[dict]:
    return [json.loads(line) for line in (TASK / name).read_text(encoding="utf-8").splitlines() if line.strip()]


def _prompt(tok, exemplars, question: str, worked: bool) -> str:
    lines = ["Solve each question step by step, then finish with \"The answer is N.\"" if worked
             else "Answer each question with the final number only."]
    for e in exemplars:
        lines += [f"Question: {e['question']}",
                  f"Solution: {e['steps']}" if worked else f"Answer: {e['answer']}"]
    lines += [f"Question: {question}", "Solution:" if worked else "Answer:"]
    return tok.apply_chat_template([{"role": "user", "content": "\n".join(lines)}],
                                   tokenize=False, add_generation_prompt=True)


@pytest.fixture(scope="module")
def smollm2():
    from evalkit.models import load, resolve

    loaded = load(resolve("smollm2-135m"))
    return loaded.model, loaded.tokenizer


def _check(got, ref):
    ties = 0
    for g, r in zip(got, ref):
        assert g.prompt_tokens == r.prompt_tokens
        if (g.text, g.new_tokens, g.finish) != (r.text, r.new_tokens, r.finish):
            assert min(g.min_margin, r.min_margin) < TIE_MARGIN, (g, r)
            ties += 1
    return ties


@pytest.mark.parametrize("worked", [False, True], ids=["direct", "worked"])
def test_engine_equals_generate_on_smollm2(smollm2, worked):
    model, tok = smollm2
    questions, exemplars = _rows("questions.jsonl"), _rows("exemplars.jsonl")
    n, shots, max_new = (6, 2, 48) if worked else (8, 4, 16)
    prompts = [_prompt(tok, exemplars[:shots], q["question"], worked) for q in questions[:n]]
    stop = ["\nQuestion:"] if worked else ["\n"]
    ref = reference_generate(model, tok, prompts, max_new_tokens=max_new, stop=stop)
    got = greedy_generate(model, tok, prompts, max_new_tokens=max_new, stop=stop, batch_size=4)
    assert _check(got, ref) <= 1
    assert all(g.new_tokens >= 1 and g.text.strip() for g in got)
    # One row at a time: every step takes the one-row products (linear_order.one_row).
    alone = greedy_generate(model, tok, prompts[:3], max_new_tokens=max_new, stop=stop, batch_size=1)
    assert _check(alone, ref[:3]) <= 1
