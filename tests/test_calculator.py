"""Calculator in the loop over a scripted backend: exact results inserted, log matches text."""

from __future__ import annotations

from evalkit.backends.scripted import ScriptedBackend
from evalkit.calculator import calculator_generate
from evalkit.steps import find_steps

# A "model" that slips: it multiplies wrongly, then carries its own results forward faithfully.
CONTINUATIONS = {
    "": " A crate holds 3 * 4 = 13 tubes. Then 13 + 2 = 15. The answer is 15.",
    " A crate holds 3 * 4 = 12": " tubes. Then 12 + 2 = 15. The answer is 15.",
    " A crate holds 3 * 4 = 12 tubes. Then 12 + 2 = 14": ". The answer is 14.",
}


def script(prompt: str) -> str:
    _, _, chain = prompt.partition("Solution:")
    return CONTINUATIONS[chain]


def test_slips_are_replaced_and_logged():
    backend = ScriptedBackend(script)
    got = calculator_generate(backend, ["Q: crates?\nSolution:"], max_new_tokens=200, stop=["\nQ:"])[0]
    assert got.text == " A crate holds 3 * 4 = 12 tubes. Then 12 + 2 = 14. The answer is 14."
    log = got.extra["calculator"]
    assert [(e["expression"], e["model_wrote"], e["inserted"]) for e in log] == [("3 * 4", "13", "12"), ("12 + 2", "15", "14")]
    for e in log:  # the log points at the inserted text
        assert got.text[e["offset"]: e["offset"] + len(e["inserted"])] == e["inserted"]
    steps = find_steps(got.text)
    assert steps and all(s.holds for s in steps)
    assert len(backend.calls) == 3  # one call, then one per intervention


def test_correct_chains_are_left_alone():
    backend = ScriptedBackend(lambda p: " 2 + 2 = 4. The answer is 4.")
    got = calculator_generate(backend, ["Solution:"], max_new_tokens=50, stop=[])[0]
    assert got.text == " 2 + 2 = 4. The answer is 4." and got.extra["calculator"] == []
    assert len(backend.calls) == 1
