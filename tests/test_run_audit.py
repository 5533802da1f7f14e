"""Audit, compare and report commands over a scripted run: they read only the store."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from evalkit import api
from evalkit.backends.scripted import ScriptedBackend

from .conftest import NURSERY_QUESTIONS

# Worked chains by question id: sound, slip, reasoning, contradiction, no steps, sound.
CHAINS = {
    "n1": " 12 * 8 = 96. The answer is 96.",
    "n2": " 5 * 3 = 16. 2 * 7 = 14. 16 + 14 = 30. The answer is 30.",
    "n3": " 40 + 15 = 55. The answer is 55.",
    "n4": " 6 * 9 = 54. The answer is 45.",
    "n5": " Lots of bulbs. The answer is 81.",
    "n6": " 60 / 4 = 15. The answer is 15.",
}
EXPECTED = {"n1": "sound", "n2": "slip", "n3": "reasoning", "n4": "contradiction", "n5": "no-steps", "n6": "sound"}


def factory(model, study):
    def script(prompt: str) -> str:
        q = next(x for x in NURSERY_QUESTIONS if x["question"] in prompt.rsplit("Question:", 1)[-1])
        if prompt.rstrip().endswith("Solution:"):
            return CHAINS[q["id"]]
        return " " + q["answer"] if q["id"] in ("n1", "n2") else " 3"
    return ScriptedBackend(script, name=model)


@pytest.fixture
def run_dir(nursery, tmp_path):
    study = api.study_for(nursery, models=["scripted"], styles=["direct", "worked"], shots=[2])
    api.run(study, out=tmp_path / "run", backend_factory=factory, progress=False)
    return tmp_path / "run"


def test_audit_stores_verdicts(run_dir):
    counts = api.audit(run_dir)
    from evalkit.store import RunStore

    with RunStore.open_run(run_dir) as s:
        v = s.verdicts()
    got = dict(zip(v["question_id"], v["verdict"]))
    assert got == EXPECTED  # direct records carry no chain and get no verdict
    slip = v.set_index("question_id").loc["n2", "detail"]
    assert slip["first_wrong"] == 0 and slip["repaired_answer"] == "29"
    assert slip["steps"][0]["expression"] == "5 * 3" and slip["steps"][0]["holds"] is False
    row = counts.set_index("condition").iloc[0]
    assert row["sound"] == 2 and row["slip"] == 1
    report = (run_dir / "report.md").read_text()
    assert "## Chain audit" in report and "⟦5 * 3 = 16⟧" in report
    html = (run_dir / "report.html").read_text()
    assert 'class="bad"' in html and 'data-verdict="slip"' in html


def test_audit_twice_is_idempotent(run_dir):
    a = api.audit(run_dir)
    b = api.audit(run_dir)
    assert a.equals(b)


def test_compare_writes_table_and_forest(run_dir):
    table = api.compare(run_dir)
    assert len(table) == 1
    r = table.iloc[0]
    assert r["n"] == 6 and r["accuracy_a"] == pytest.approx(2 / 6) and r["accuracy_b"] == pytest.approx(3 / 6)
    assert "no difference distinguishable from noise" in r["verdict"]
    assert (run_dir / "comparisons.csv").is_file() and (run_dir / "plots" / "comparisons.svg").is_file()


def test_cli_audit_and_compare(run_dir):
    for cmd in ("audit", "compare", "report"):
        r = subprocess.run([sys.executable, "-m", "evalkit", cmd, str(run_dir)], capture_output=True, text=True,
                           env={"COLUMNS": "200", "PATH": ""}, timeout=120)
        assert r.returncode == 0, r.stderr
    assert "slip" in subprocess.run([sys.executable, "-m", "evalkit", "audit", str(run_dir)], capture_output=True,
                                    text=True, env={"COLUMNS": "200"}).stdout
    r = subprocess.run([sys.executable, "-m", "evalkit", "compare", str(tmp := run_dir / "nope")], capture_output=True,
                       text=True)
    assert r.returncode == 2 and "no manifest" in r.stderr


def test_html_escapes_model_output(nursery, tmp_path):
    def evil(model, study):
        return ScriptedBackend(lambda p: ' <script>document.title="pwned"</script> 2 + 2 = 5. The answer is 4.', name=model)

    study = api.study_for(nursery, models=["evil"], styles=["worked"], shots=[1])
    api.run(study, out=tmp_path / "evil", backend_factory=evil, progress=False)
    api.audit(tmp_path / "evil")
    html = (tmp_path / "evil" / "report.html").read_text()
    assert '<script>document.title' not in html
    assert "&lt;script&gt;document.title=&#34;pwned&#34;&lt;/script&gt;" in html
    manifest = json.loads((tmp_path / "evil" / "manifest.json").read_text())
    assert manifest["records"] == len(NURSERY_QUESTIONS)
