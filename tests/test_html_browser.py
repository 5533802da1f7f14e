"""The static HTML report opened in a real browser (headless Chromium under selenium).

One scripted run over the nursery task (two invented model sizes x direct/worked, audited) is
rendered once; each test reloads its report.html from disk and checks what a reader sees: the
summary table, the inline plots, the record filters, model text shown as text and never run,
a quiet console, and a full-page screenshot kept as a test artifact.
"""

from __future__ import annotations

import struct
from pathlib import Path

import pytest
from statsmodels.stats.proportion import proportion_confint

from evalkit import api
from evalkit.backends.scripted import ScriptedBackend

from . import browser
from .conftest import NURSERY_EXEMPLARS, NURSERY_QUESTIONS, SPEC, write_jsonl

SCRIPT_TAG = '<script>document.title="pwned"</script>'
IMG_TAG = "<img src=x onerror=\"document.title='pwned2'\">"

# Completions by (model, style, question id), with the outcome and verdict each must get. The
# outcomes follow from the gold answers in conftest; the verdicts from the arithmetic of each chain.
SCRIPT = {
    ("sprout-s", "direct"): {
        "n1": (" 96", "correct", ""), "n2": (" 29", "correct", ""),
        "n3": (f" {SCRIPT_TAG} The answer is 7.", "wrong", ""),
        "n4": (f" {IMG_TAG} The answer is 9.", "wrong", ""),
        "n5": (" 3", "wrong", ""), "n6": (" 3", "wrong", ""),
    },
    ("sprout-s", "worked"): {
        "n1": (" 12 * 8 = 96. The answer is 96.", "correct", "sound"),
        "n2": (" 5 * 3 = 16. 2 * 7 = 14. 16 + 14 = 30. The answer is 30.", "wrong", "slip"),
        "n3": (" 40 + 15 = 55. The answer is 55.", "wrong", "reasoning"),
        "n4": (" 6 * 9 = 54. The answer is 45.", "wrong", "contradiction"),
        "n5": (" Lots of bulbs. The answer is 81.", "correct", "no-steps"),
        "n6": (" 60 / 4 = 15. The answer is 15.", "correct", "sound"),
    },
    ("sprout-l", "direct"): {
        "n1": (" 96", "correct", ""), "n2": (" 29", "correct", ""), "n3": (" 25", "correct", ""),
        "n4": (" 54", "correct", ""), "n5": (" 80", "wrong", ""), "n6": (" I am not sure.", "no answer", ""),
    },
    ("sprout-l", "worked"): {
        "n1": (" 12 * 8 = 96. The answer is 96.", "correct", "sound"),
        "n2": (" 5 * 3 = 15. 2 * 7 = 14. 15 + 14 = 29. The answer is 29.", "correct", "sound"),
        "n3": (" 40 - 15 = 25. The answer is 25.", "correct", "sound"),
        "n4": (" 6 * 9 = 54. The answer is 54.", "correct", "sound"),
        "n5": (" 7 * 11 = 77. 77 + 4 = 81. The answer is 81.", "correct", "sound"),
        "n6": (" 60 / 4 = 15. The answer is 15.", "correct", "sound"),
    },
}
# (parameters, non-embedding parameters): invented sizes so the size and compute plots are drawn.
SIZES = {"sprout-s": (135_000_000, 106_000_000), "sprout-l": (1_700_000_000, 1_600_000_000)}
TITLE = "evalkit report: nursery"


def label(model: str, style: str) -> str:
    return f"{model} | {style} | 2-shot | draw 0"


EXPECTED = [  # one row per record: condition label, question id, outcome, verdict
    (label(m, s), qid, outcome, verdict)
    for (m, s), rows in SCRIPT.items() for qid, (_, outcome, verdict) in rows.items()
]


class SizedScripted(ScriptedBackend):
    """Scripted completions that also report a parameter count, as a loaded model would."""

    def describe(self) -> dict:
        total, non_embedding = SIZES[self.name]
        return {**super().describe(), "parameters": total, "non_embedding_parameters": non_embedding}


def factory(model, study):
    def script(prompt: str) -> str:
        q = next(x for x in NURSERY_QUESTIONS if x["question"] in prompt.rsplit("Question:", 1)[-1])
        style = "worked" if prompt.rstrip().endswith("Solution:") else "direct"
        return SCRIPT[(model, style)][q["id"]][0]
    return SizedScripted(script, name=model)


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    """report.html of an audited two-model run; the run's store must agree with SCRIPT first."""
    from evalkit.run import load_run

    folder = tmp_path_factory.mktemp("browser")
    write_jsonl(folder / "questions.jsonl", NURSERY_QUESTIONS)
    write_jsonl(folder / "exemplars.jsonl", NURSERY_EXEMPLARS)
    (folder / "nursery.toml").write_text(SPEC, encoding="utf-8")
    study = api.study_for(folder / "nursery.toml", models=list(SIZES), styles=["direct", "worked"], shots=[2])
    # use_cache=False: a module-scoped fixture runs before the per-test cache isolation in conftest
    api.run(study, out=folder / "run", backend_factory=factory, progress=False, use_cache=False)
    api.audit(folder / "run")
    records = load_run(folder / "run").records
    got = sorted(zip(records["condition"], records["question_id"], records["outcome"]))
    assert got == sorted(e[:3] for e in EXPECTED), "scoring disagrees with the scripted outcomes"
    return folder / "run" / "report.html"


@pytest.fixture(scope="module")
def driver(tmp_path_factory):
    d = browser.launch(tmp_path_factory.mktemp("chromium") / "profile")
    yield d
    d.quit()


@pytest.fixture
def page(driver, report):
    """The report freshly loaded, filters at 'all', every record closed."""
    driver.get(report.as_uri())
    driver.get_log("browser")  # start each test with an empty console log
    return driver


def css(d, selector: str):
    from selenium.webdriver.common.by import By

    return d.find_elements(By.CSS_SELECTOR, selector)


def choose(d, name: str, value: str) -> None:
    from selenium.webdriver.support.ui import Select

    Select(css(d, f"#f-{name}")[0]).select_by_value(value)  # a user's pick: fires 'change'


def visible_records(d) -> list[tuple[str, str, str, str]]:
    rows = d.execute_script("""
        return [...document.querySelectorAll('#record-list details.record')]
          .filter(el => el.getClientRects().length > 0)
          .map(el => [el.dataset.condition, el.querySelector('summary code').textContent,
                      el.dataset.outcome, el.dataset.verdict]);""")
    return sorted(tuple(r) for r in rows)


def expected(condition: str = "", outcome: str = "", verdict: str = "") -> list[tuple[str, str, str, str]]:
    return sorted(e for e in EXPECTED if (not condition or e[0] == condition)
                  and (not outcome or e[2] == outcome) and (not verdict or e[3] == verdict))


def shown(d) -> str:
    return css(d, "#shown")[0].text


def open_record(d, condition: str, qid: str):
    """Click a record's summary open, as a reader would; returns the record element."""
    for el in css(d, "#record-list details.record"):
        if el.get_attribute("data-condition") == condition and css(el, "summary code")[0].text == qid:
            css(el, "summary")[0].click()
            assert el.get_attribute("open") is not None
            return el
    raise AssertionError(f"no record {qid} under {condition}")


def settle(d, ms: int = 300) -> None:
    """Let queued events (an image's onerror, say) fire before looking at their effects."""
    d.execute_async_script("var done = arguments[arguments.length - 1]; setTimeout(done, arguments[0]);", ms)


def test_summary_table_has_a_row_per_condition_with_accuracy_and_wilson_interval(page):
    rows = css(page, "#summary-table tbody tr")
    assert len(rows) == len(SCRIPT)
    header = [th.text for th in css(page, "#summary-table thead th")]
    col = {name: header.index(name) for name in ("model", "style", "accuracy", "95% interval", "n")}
    seen = set()
    for row in rows:
        assert row.is_displayed() and row.size["height"] > 0
        cells = [td.text for td in css(row, "td")]
        model, style = cells[col["model"]], cells[col["style"]]
        outcomes = [o for _, o, _ in SCRIPT[(model, style)].values()]
        k, n = outcomes.count("correct"), len(outcomes)
        # Wilson score interval from statsmodels, the reference for the report's interval column
        low, high = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert cells[col["accuracy"]] == f"{100 * k / n:.1f}%"
        assert cells[col["95% interval"]] == f"[{100 * low:.1f}, {100 * high:.1f}]"
        assert cells[col["n"]] == str(n)
        seen.add((model, style))
    assert seen == set(SCRIPT)
    assert page.title == TITLE


def test_inline_plots_render_with_size_and_fit_the_page(page):
    plots = {"size": "#plot-size > svg", "compute": "#plot-compute > svg",
             "forest": "h2#comparisons ~ figure > svg"}
    titles = {"size": "Accuracy against model size", "compute": "Accuracy against compute",
              "forest": "worked minus direct"}
    for name, selector in plots.items():
        found = css(page, selector)
        assert len(found) == 1, f"{name} plot: {len(found)} inline <svg> elements"
        box = page.execute_script("""
            const s = arguments[0], r = s.getBoundingClientRect(), p = s.parentElement.getBoundingClientRect();
            const drawn = [...s.querySelectorAll('path, use')].filter(e => {
                const b = e.getBoundingClientRect(); return b.width > 0 || b.height > 0; }).length;
            const texts = [...s.querySelectorAll('text')].filter(t => t.getBoundingClientRect().width > 0)
                .map(t => t.textContent);
            return {w: r.width, h: r.height, left: r.left, right: r.right, pright: p.right, drawn, texts};""",
                                  found[0])
        assert box["w"] > 150 and box["h"] > 100, f"{name} plot is {box['w']}x{box['h']} px"
        assert box["right"] <= box["pright"] + 1, f"{name} plot overflows its figure"
        assert box["drawn"] > 10, f"{name} plot draws {box['drawn']} visible shapes"
        assert any(titles[name] in t for t in box["texts"]), f"{name} plot text not rendered: {box['texts'][:5]}"
    assert any("sprout-s" in t for t in page.execute_script(
        "return [...document.querySelectorAll('#plot-size text')].map(t => t.textContent)"))
    # Inline SVGs share one id space: a marker or clip path referenced by id must resolve to the
    # element its own plot defined, so every referenced id names one element (or identical copies).
    clashes = page.execute_script("""
        const refs = new Set();
        document.querySelectorAll('svg [*|href], svg [clip-path]').forEach(e => {
            const v = e.getAttribute('xlink:href') || e.getAttribute('href') || e.getAttribute('clip-path') || '';
            const m = v.match(/#([^)'"]+)/); if (m) refs.add(m[1]); });
        return [refs.size, [...refs].filter(id => {
            const found = [...document.querySelectorAll('[id="' + CSS.escape(id) + '"]')];
            return found.length === 0 || new Set(found.map(f => f.outerHTML)).size > 1; })];""")
    assert clashes[0] > 5 and clashes[1] == [], f"plot ids missing or defined differently twice: {clashes}"
    width = page.execute_script("return [document.documentElement.scrollWidth, document.documentElement.clientWidth]")
    assert width[0] <= width[1], f"the page scrolls sideways at 1280 px: {width}"


def test_outcome_filter_hides_other_records_and_counts_them(page):
    assert visible_records(page) == expected() and shown(page) == f"{len(EXPECTED)} shown"
    options = [o.get_attribute("value") for o in css(page, "#f-outcome option")]
    assert options == ["", "correct", "no answer", "wrong"]
    for outcome in ("wrong", "no answer", "correct"):
        choose(page, "outcome", outcome)
        want = expected(outcome=outcome)
        assert visible_records(page) == want
        assert shown(page) == f"{len(want)} shown"
        hidden = css(page, "#record-list details.record.hidden")
        assert len(hidden) == len(EXPECTED) - len(want)
        assert all(h.get_attribute("data-outcome") != outcome and not h.is_displayed() for h in hidden)
    choose(page, "outcome", "")
    assert visible_records(page) == expected() and shown(page) == f"{len(EXPECTED)} shown"


def test_condition_and_verdict_filters_combine(page):
    conditions = [o.get_attribute("value") for o in css(page, "#f-condition option")][1:]
    assert conditions == [label(m, s) for m, s in SCRIPT]
    verdicts = [o.get_attribute("value") for o in css(page, "#f-verdict option")][1:]
    assert verdicts == sorted({e[3] for e in EXPECTED if e[3]})
    small_worked = label("sprout-s", "worked")
    choose(page, "condition", small_worked)
    assert visible_records(page) == expected(condition=small_worked) and shown(page) == "6 shown"
    choose(page, "verdict", "slip")
    assert visible_records(page) == expected(condition=small_worked, verdict="slip") == [
        (small_worked, "n2", "wrong", "slip")]
    assert shown(page) == "1 shown"
    choose(page, "condition", "")
    choose(page, "verdict", "sound")
    assert visible_records(page) == expected(verdict="sound") and shown(page) == "8 shown"
    choose(page, "outcome", "wrong")  # no sound chain here ends wrong: an empty list, counted as such
    assert visible_records(page) == [] and shown(page) == "0 shown"


def test_filter_bar_stays_in_view_while_scrolling_records(page):
    page.execute_script("document.getElementById('record-list').lastElementChild.scrollIntoView()")
    top = page.execute_script("return document.getElementById('filters').getBoundingClientRect().top")
    assert abs(top) <= 1, f"filter bar top at {top} px after scrolling"


def test_model_markup_is_shown_as_text_and_never_runs(page):
    small_direct = label("sprout-s", "direct")
    for qid, tag in (("n3", SCRIPT_TAG), ("n4", IMG_TAG)):
        record = open_record(page, small_direct, qid)
        pre = css(record, "pre.completion")[0]
        assert pre.is_displayed() and tag in pre.text
    settle(page)
    assert page.title == TITLE
    assert page.execute_script("return document.title") == TITLE
    assert css(page, "#record-list img") == [] and css(page, "#record-list script") == []
    assert page.execute_script("return document.scripts.length") == 1  # the report's own filter


def test_wrong_step_is_marked_in_the_open_chain(page):
    record = open_record(page, label("sprout-s", "worked"), "n2")
    bad = css(record, "pre.completion mark.bad")
    good = css(record, "pre.completion mark.good")
    assert [m.text for m in bad] == ["5 * 3 = 16"] and bad[0].is_displayed()
    assert bad[0].get_attribute("title") == "should be 15"  # 5 * 3 is 15
    fix = css(record, "pre.completion span.fix")
    assert [f.text for f in fix] == ["(is 15)"] and fix[0].is_displayed()  # the correction is visible, not hover-only
    assert len(good) == 2  # 2 * 7 = 14 and 16 + 14 = 30 hold as written
    colours = {m.value_of_css_property("background-color") for m in (bad[0], good[0])}
    assert len(colours) == 2, "wrong and sound steps look the same"


def test_no_console_errors_while_reading(page):
    for name, value in (("outcome", "wrong"), ("verdict", "slip"), ("condition", label("sprout-l", "direct"))):
        choose(page, name, value)
    for name in ("condition", "outcome", "verdict"):
        choose(page, name, "")
    open_record(page, label("sprout-s", "direct"), "n4")
    settle(page)
    logs = page.get_log("browser")
    assert [e for e in logs if e["level"] in ("SEVERE", "WARNING")] == []


def test_full_page_screenshot_is_saved(page):
    for condition, qid in ((label("sprout-s", "direct"), "n3"), (label("sprout-s", "direct"), "n4"),
                           (label("sprout-s", "worked"), "n2")):
        open_record(page, condition, qid)
    png = browser.full_page_png(page)
    path = browser.artifacts_dir() / "report.png"
    path.write_bytes(png)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", png[16:24])  # IHDR: the first chunk, by the PNG specification
    viewport = page.execute_script("return window.innerHeight")
    assert width >= 1000 and height > 2 * viewport, f"screenshot is {width}x{height}, not the full page"
    assert len(png) > 20_000, f"screenshot is only {len(png)} bytes"
