"""Faithfulness probes over a scripted backend whose answers do or do not follow the chain."""

from __future__ import annotations

import pytest

from evalkit import api
from evalkit.backends.scripted import ScriptedBackend
from evalkit.probes import ANSWER_CUE, FRACTIONS, plan_probes

CHAIN = " 12 * 8 = 96. 96 + 4 = 100. The answer is 100."


def make_factory(faithful: bool):
    """A model whose answer follows its chain (faithful) or is fixed whatever the chain says."""
    def factory(model, study):
        def script(prompt: str) -> str:
            tail = prompt.rsplit("Solution:", 1)[-1]
            if tail == "":
                return CHAIN
            if tail.endswith(ANSWER_CUE):  # early answering
                steps_kept = tail.count("=")
                if not faithful:
                    return " 100."
                return {0: " 7.", 1: " 96.", 2: " 100."}[steps_kept]
            # continued after an injected mistake: "... = 9X" or "... = 10X"
            last = tail.rsplit("=", 1)[-1].strip()
            if not faithful:
                return ". The answer is 100."
            return f". The answer is {int(last) + 4 if tail.count('=') == 1 else int(last)}."
        return ScriptedBackend(script, name=model)
    return factory


@pytest.fixture
def run_dir(nursery, tmp_path):
    study = api.study_for(nursery, models=["scripted"], styles=["worked"], shots=[1], limit=2)
    api.run(study, out=tmp_path / "run", backend_factory=make_factory(True), progress=False)
    return tmp_path / "run"


def test_plan_covers_every_cut_and_one_mistake(run_dir):
    from evalkit.run import load_run

    reqs = plan_probes(load_run(run_dir).records, 160, ["\nQuestion:"])
    early = [r for r in reqs if r.probe == "early"]
    assert len(early) == 2 * len(FRACTIONS) and sum(r.probe == "mistake" for r in reqs) == 2
    assert early[0].suffix == ANSWER_CUE and early[-1].suffix == " 12 * 8 = 96. 96 + 4 = 100" + ANSWER_CUE


@pytest.mark.parametrize("faithful", [True, False])
def test_change_rates(run_dir, faithful):
    rates = api.probe(run_dir, backend_factory=make_factory(faithful), progress=False)
    row = rates.iloc[0]
    assert row["chains"] == 2
    if faithful:
        assert row["early 0%"] == 1.0 and row["early 100%"] == 0.0 and row["injected mistake"] == 1.0
    else:
        assert row["early 0%"] == 0.0 and row["injected mistake"] == 0.0
    assert "## Faithfulness probes" in (run_dir / "report.md").read_text()
    assert 'id="probe-table"' in (run_dir / "report.html").read_text()


def test_report_text_gives_each_share_its_wilson_interval(run_dir):
    """Two chains say little: each share in the reports carries its 95% Wilson interval
    (statsmodels' proportion_confint as the reference)."""
    from statsmodels.stats.proportion import proportion_confint

    from evalkit.probes import probe_intervals
    from evalkit.run import load_run
    from evalkit.store import RunStore

    api.probe(run_dir, backend_factory=make_factory(True), progress=False)
    with RunStore.open_run(run_dir) as store:
        probes = store.probes()
    text = probe_intervals(probes, load_run(run_dir).records).iloc[0]
    low, high = proportion_confint(2, 2, alpha=0.05, method="wilson")
    assert text["early 0%"] == f"100% [{100 * low:.0f}, {100 * high:.0f}]" == "100% [34, 100]"
    low, high = proportion_confint(0, 2, alpha=0.05, method="wilson")
    assert text["early 100%"] == f"0% [0, {100 * high:.0f}]" == "0% [0, 66]"
    assert "| 100% [34, 100] |" in (run_dir / "report.md").read_text()
    assert "100% [34, 100]" in (run_dir / "report.html").read_text()
    cli = api.probe(run_dir, backend_factory=make_factory(True), progress=False, as_text=True)
    assert cli.iloc[0]["early 0%"] == "100% [34, 100]"
