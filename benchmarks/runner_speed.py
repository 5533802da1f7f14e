"""How fast evalkit's greedy engine runs, against the usual ways of calling ``generate``.

Run it alone on the machine (other processes make CPU timings meaningless)::

    python benchmarks/runner_speed.py                 # SmolLM2-135M-Instruct, float32, 64 questions
    python benchmarks/runner_speed.py --quick         # fewer questions and fewer side runs
    python benchmarks/runner_speed.py --model-folder /path/to/tiny --quick   # smoke test

On the bundled workshop task it measures, in one run and as ratios within that run:

* (a) plain ``generate`` one prompt at a time, no stop strings (runs to the length limit);
* (b) batched ``generate`` with ``stop_strings=``, left padding, as a typical loop writes it;
* (c) ``greedy_generate``, three times per style (``--engine-runs``), interleaved with (a) and (b)
  (engine, plain, engine, batched, engine): the median is set against the baselines, and each
  run's ratio is listed, so one slow moment of a shared machine is visible rather than the result;

for direct prompts (6 shots, 24 new tokens) and worked prompts (4 shots, 128 new tokens).
It also measures the machine (memory read bandwidth, float32 matmul rate), sets the engine's
decode rate against the compute bound (2 x parameters FLOPs per token) at large batches and
the bandwidth bound (the weights read once per decode step) at batch 1, peak memory, how the per-item cost
grows with questions and shots, a bfloat16 run, and how long the packaged models take to load
a second time (those already converted in the cache). Output is a Markdown report on stdout.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import resource
import statistics
import sys
import time
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from evalkit.backends.base import TIE_MARGIN  # noqa: E402
from evalkit.backends.engine import greedy_generate  # noqa: E402
from evalkit.backends.stops import cut_at_stop  # noqa: E402
from evalkit.cpu_load import BUSY_CORES, OtherLoad  # noqa: E402

TASK = ROOT / "task_specs" / "workshop" / "workshop.toml"
STOP = ["\nQuestion:", "\n\n\n"]  # the study default (evalkit.spec.Decoding)
STYLES = {"direct": (6, 24), "worked": (4, 128)}  # style: (shots, max_new_tokens)
BASELINE_BATCH = 8


def load_model(folder: str | None, dtype: str):
    """The model under test: a transformers folder, or the packaged SmolLM2-135M-Instruct."""
    if folder:
        from transformers import AutoModelForCausalLM, AutoTokenizer

        model = AutoModelForCausalLM.from_pretrained(folder, dtype=getattr(torch, dtype)).eval()
        tok = AutoTokenizer.from_pretrained(folder)
        if tok.pad_token is None:
            tok.pad_token = tok.eos_token
        return model, tok, folder
    from evalkit.models import load, resolve

    loaded = load(resolve("smollm2-135m"), dtype=dtype)
    return loaded.model, loaded.tokenizer, "smollm2-135m"


def build_prompts(tok, style: str, shots: int, n: int) -> list[str]:
    """Workshop prompts of one style, drawn and rendered as a study would, chat-wrapped."""
    from evalkit.data import load_task_data
    from evalkit.prompts import draw_exemplars, render
    from evalkit.spec import load_task

    task = load_task_data(load_task(TASK))
    exemplars = draw_exemplars(task.exemplars, shots, seed=0, draw=0)
    chat = bool(getattr(tok, "chat_template", None))
    out = []
    for q in (task.questions * (1 + n // max(1, len(task.questions))))[:n]:
        text = render(task, style, exemplars, q.question, chat=chat)
        if chat:
            text = tok.apply_chat_template([{"role": "user", "content": text}],
                                           tokenize=False, add_generation_prompt=True)
        out.append(text)
    return out


def _cut(text: str) -> str:
    i = cut_at_stop(text, STOP)
    return text if i is None else text[:i]


def _clock(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def plain_generate(model, tok, prompts, max_new):
    """(a): one prompt at a time, greedy, no stop strings; texts cut afterwards."""
    texts, tokens = [], 0
    for p in prompts:
        ids = tok(p, return_tensors="pt", add_special_tokens=False)
        with torch.inference_mode():
            seq = model.generate(**ids, max_new_tokens=max_new, do_sample=False,
                                 pad_token_id=tok.pad_token_id)
        new = seq[0, ids["input_ids"].shape[1]:]
        tokens += len(new)
        texts.append(_cut(tok.decode(new, skip_special_tokens=True)))
    return texts, tokens


def batched_generate(model, tok, prompts, max_new, batch=BASELINE_BATCH):
    """(b): batches of prompts, left padding, ``stop_strings=`` as most loops pass it."""
    tok.padding_side = "left"
    texts, tokens = [], 0
    for a in range(0, len(prompts), batch):
        enc = tok(prompts[a:a + batch], return_tensors="pt", padding=True, add_special_tokens=False)
        with torch.inference_mode():
            seq = model.generate(**enc, max_new_tokens=max_new, do_sample=False, stop_strings=STOP,
                                 tokenizer=tok, pad_token_id=tok.pad_token_id)
        for row in seq[:, enc["input_ids"].shape[1]:]:
            ids = [t for t in row.tolist() if t != tok.pad_token_id]
            tokens += len(ids)
            texts.append(_cut(tok.decode(ids, skip_special_tokens=True)))
    return texts, tokens


def machine_rates(quick: bool) -> tuple[float, float]:
    """Memory read bandwidth (GB/s, summing a 512 MB tensor) and float32 matmul GFLOP/s.

    Each is the best of several repetitions: the machine's capability, not its average
    under whatever else shares it (on a shared 2-core machine single repetitions wandered
    by 10-30%), so the runner's shares of the bounds are not flattered by a slow moment.
    """
    x = torch.ones(128 * 1024 * 1024 // (4 if quick else 1), dtype=torch.float32)
    x.sum()
    reps = 3 if quick else 8
    t = min(_clock(x.sum)[1] for _ in range(reps))
    bandwidth = x.nbytes / t / 1e9
    n = 1024 if quick else 2048
    a, b = torch.randn(n, n), torch.randn(n, n)
    a @ b
    t = min(_clock(lambda: a @ b)[1] for _ in range(reps))
    return bandwidth, 2 * n ** 3 / t / 1e9


def decode_rate(model, tok, prompts, batch: int, steps: int) -> float:
    """Engine decode tokens/s at ``batch`` rows: tokens of the decode steps over their time.

    Each decode step of the engine is timed as it runs (prefill and the rest of the call are
    left out; the engine's first token of each row comes out of prefill). An earlier version
    took the difference of a run to ``steps`` tokens and a run to 1 token: that difference
    carried the noise of two prefills (at 128 rows about 30 s each), tens of milliseconds
    per step. End-of-sequence is switched off (no stop strings either), so every row decodes
    every step and the batch stays full: this measures the step rate at that batch, not how
    soon the model stops. The run is made twice and the faster kept.
    """
    import evalkit.backends.engine as engine

    saved_eos, saved_step = engine.eos_ids, engine._Run.step
    timed: list[tuple[int, float]] = []  # (rows, seconds) of each decode step

    def timed_step(run, slab, rows):
        _, t = _clock(lambda: saved_step(run, slab, rows))
        timed.append((len(rows), t))

    engine.eos_ids = lambda model, tokenizer: set()
    engine._Run.step = timed_step
    best = 0.0
    try:
        for _ in range(2):
            timed.clear()
            greedy_generate(model, tok, prompts, max_new_tokens=steps, batch_size=batch, reuse_prefix=True)
            best = max(best, sum(r for r, _ in timed) / max(1e-9, sum(t for _, t in timed)))
    finally:
        engine.eos_ids, engine._Run.step = saved_eos, saved_step
    return best


def linear_flops_per_token(model) -> tuple[int, int]:
    """FLOPs one token costs in the model's linear layers (2 x weight elements each): the
    layers' (the body's) and the vocabulary projection's. Attention's products and all the
    element-wise work are left out, so a bound built on these counts is generous."""
    head = model.get_output_embeddings()
    body = sum(2 * m.weight.numel() for m in model.modules()
               if isinstance(m, torch.nn.Linear) and m is not head)
    return body, 2 * head.weight.numel()


def workload(tok, prompts, gens) -> dict[str, int]:
    """What the engine had to compute for one style's run, from its prompts and completions:
    the shared prefix once, each question's own tokens after it, the vocabulary projections
    that start each completion, and one decode step per generated token after the first."""
    from evalkit.backends.engine import shared_prefix_length

    enc = tok(list(prompts), add_special_tokens=False)["input_ids"]
    P = shared_prefix_length(enc)
    return {"prefix": P, "suffix": sum(len(e) - P for e in enc), "questions": len(enc),
            "decode": sum(max(0, g.new_tokens - 1) for g in gens)}


def workload_gflop(model, work: dict[str, int]) -> float:
    """The linear layers' GFLOP of :func:`workload`'s counts."""
    body, head = linear_flops_per_token(model)
    return (body * (work["prefix"] + work["suffix"]) + head * work["questions"]
            + (body + head) * work["decode"]) / 1e9


def layer_rate(model, rows: int = 512, reps: int = 3) -> float:
    """GFLOP/s of the model's own linear layers at ``rows`` rows: the faster of plain ``F.linear``
    and the engine's own forms (packed weights where it packs), best of ``reps`` each; the rate
    their shapes allow, at or below the square matmul's."""
    from evalkit.backends import linear_order
    from evalkit.backends.engine import _mem_available

    lins = [m for m in model.modules() if isinstance(m, torch.nn.Linear)]
    xs = {m.in_features: torch.randn(rows, m.in_features, dtype=m.weight.dtype) for m in lins}
    flops = rows * sum(linear_flops_per_token(model))  # every linear layer, the head included

    def plain():
        with torch.inference_mode():
            for m in lins:
                torch.nn.functional.linear(xs[m.in_features], m.weight)

    def engine_forms():
        with torch.inference_mode():
            for m in lins:
                m(xs[m.in_features])

    best = float("inf")
    for form in (plain, engine_forms):
        with linear_order.engine_linears(model, pack=linear_order.should_pack(model, _mem_available())) \
                if form is engine_forms else contextlib.nullcontext():
            form()
            best = min(best, *(_clock(form)[1] for _ in range(reps)))
    return flops / best / 1e9


def bound_table(model, works, rates, gflops: float, shapes_gflops: float) -> list[str]:
    """What the arithmetic allows: each style's linear-layer GFLOP at the matmul rate and at
    the rate the model's layer shapes reach, the items/s that leaves (attention and all else
    free), and the engine's and plain ``generate``'s places against it."""
    out = ["| style | prefix | own tokens | decode steps | GFLOP | products alone | bound items/s | "
           "engine's share | bound / plain generate |", "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |"]
    for style, w in works.items():
        g = workload_gflop(model, w)
        plain, engine = rates[style]
        for label, rate in (("square matmul", gflops), ("layer shapes", shapes_gflops)):
            bound = w["questions"] / (g / rate)
            out.append(f"| {style} ({label}) | {w['prefix']} | {w['suffix']} | {w['decode']} | {g:.4g} | "
                       f"{g / rate:.2f} s | {bound:.1f} | {100 * engine / bound:.0f}% | {bound / plain:.1f}x |")
    out += ["", f"Bound: the linear layers' products of the run (the shared prefix once, each question's "
            f"own tokens, one vocabulary projection per question, one decode step per generated token "
            f"after the first) at {gflops:.1f} GFLOP/s (square matmul) or {shapes_gflops:.1f} GFLOP/s "
            f"(this model's layers at 512 rows), with attention, padding, rows that ended and all "
            f"element-wise work counted as free. No float32 runner computing these products is faster; "
            f"the last column is the most any such runner could gain over plain `generate` here.", ""]
    return out


def linear_layers(model) -> str:
    """Which form the engine's linear layers take here; packs the weights now if they will be
    packed, so the one-off cost is reported here and not charged to the first timed run."""
    from evalkit.backends import linear_order
    from evalkit.backends.engine import _mem_available

    if not linear_order.should_pack(model, _mem_available()):
        return "Engine's linear layers: `W @ x.T` through MKL (packing unavailable or short of memory)."
    layers = linear_order.packable_linears(model)
    form = linear_order.packing_form()
    _, t = _clock(lambda: [linear_order.packed_weight(m, form) for m in layers])
    checked = ""
    if form == "mkl":
        agrees, t_check = _clock(lambda: linear_order.mkl_packing_agrees(model))
        if agrees:
            checked = f"; checked against `x @ W.T` in {t_check:.2f} s"
        else:
            form = "onednn"
            _, t = _clock(lambda: [linear_order.packed_weight(m, form) for m in layers])
            checked = "; MKL's packed products disagreed with `x @ W.T`, so oneDNN's"
    mb = sum(m.weight.nbytes for m in layers) / 1e6
    library = {"mkl": "MKL", "onednn": "oneDNN"}[form]
    return (f"Engine's linear layers: {library} on packed float32 weights ({len(layers)} layers, "
            f"{mb:.0f} MB of copies, packed once in {t:.2f} s before the timed runs{checked}).")


def second_loads() -> list[str]:
    """Load each packaged model that is already converted in the cache twice; report both."""
    from evalkit.models import list_models, load, resolve

    lines = ["| model | first load in this process | second load |", "| --- | ---: | ---: |"]
    table = list_models()
    for row in table[table.kind == "packaged"].itertuples():
        if not row.converted:
            lines.append(f"| {row.name} | not converted in the cache yet (a run converts it once) | |")
            continue
        times = [load(resolve(row.name)).load_seconds for _ in range(2)]
        lines.append(f"| {row.name} | {times[0]:.2f} s | {times[1]:.2f} s |")
    return lines


def _peak_mb() -> float:
    """This process's peak resident memory so far, in MB (Linux reports kilobytes)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--questions", type=int, default=64, help="questions per style (default 64)")
    ap.add_argument("--quick", action="store_true", help="fewer questions and side measurements")
    ap.add_argument("--model-folder", help="a transformers model folder instead of SmolLM2 (smoke tests)")
    ap.add_argument("--threads", type=int, help="torch threads (default: as loaded)")
    ap.add_argument("--engine-runs", type=int, default=3,
                    help="runs of the engine per style, interleaved with the baselines; the median is "
                         "reported (default 3)")
    args = ap.parse_args(argv)
    if args.engine_runs < 1:
        ap.error("--engine-runs must be at least 1")
    n = min(args.questions, 8) if args.quick else args.questions
    n_plain = min(n, 4 if args.quick else 8)  # (a) is slow: timed on a subset, per item
    others = OtherLoad()  # CPU used by other processes while this runs: timings mean little if it is high

    model, tok, name = load_model(args.model_folder, "float32")
    if args.threads:
        torch.set_num_threads(args.threads)
    n_params = model.num_parameters()
    weight_bytes = sum(p.numel() * p.element_size() for p in model.parameters())
    lines = [f"# Runner speed: {name}, float32, {torch.get_num_threads()} threads, {n} questions per style", ""]
    start_rates = machine_rates(args.quick)
    lines += ["{machine}", ""]  # filled in once the rates are measured again, before the decode table
    lines += [linear_layers(model), ""]

    lines += ["| style | method | items | seconds | items/s | useful tokens/s | engine speed-up | same text as engine |",
              "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: |"]
    # Warm-up: first calls pay one-off costs (lazy imports, allocator growth) nobody else should.
    warm = build_prompts(tok, "direct", 2, 2)
    greedy_generate(model, tok, warm, max_new_tokens=2)
    plain_generate(model, tok, warm[:1], 2)
    batched_generate(model, tok, warm, 2)
    f32_texts, differ_notes = {}, []
    works, rates = {}, {}  # per style: what the engine computed; items/s of plain generate and the engine
    engine_notes = []
    peaks: list[tuple[str, float]] = []  # the process's peak so far, after each part: where it was reached
    for style, (shots, max_new) in STYLES.items():
        prompts = build_prompts(tok, style, shots, n)

        def engine_run():
            return _clock(lambda: greedy_generate(model, tok, prompts, max_new_tokens=max_new, stop=STOP))

        # The engine's run is repeated and interleaved with the baselines (engine, plain,
        # engine, batched, engine, ...): its median is set against baselines timed in the
        # same stretch, so one slow moment of a shared machine does not make the ratio.
        runs = [engine_run()]
        (pa, _), t_a = _clock(lambda: plain_generate(model, tok, prompts[:n_plain], max_new))
        if args.engine_runs > 1:
            runs.append(engine_run())
        (pb, _), t_b = _clock(lambda: batched_generate(model, tok, prompts, max_new))
        while len(runs) < args.engine_runs:
            runs.append(engine_run())
        eng = runs[0][0]
        times = [t for _, t in runs]
        t_eng = statistics.median(times)
        f32_texts[style] = [g.text for g in eng]
        unstable = sum(len({g.text for g in row}) > 1 for row in zip(*(r for r, _ in runs)))
        useful = sum(g.new_tokens for g in eng)
        rate_e = n / t_eng
        works[style] = workload(tok, prompts, eng)
        rates[style] = (n_plain / t_a, rate_e)
        per = [("plain generate, one at a time", n_plain, t_a, pa),
               (f"batched generate + stop_strings (batch {BASELINE_BATCH})", n, t_b, pb),
               ("evalkit engine" + (f" (median of {len(runs)} runs)" if len(runs) > 1 else ""),
                n, t_eng, f32_texts[style])]
        for label, items, secs, texts in per:
            same = sum(a == b for a, b in zip(texts, f32_texts[style]))
            ties = sum(a != b and g.min_margin < TIE_MARGIN for a, b, g in zip(texts, f32_texts[style], eng))
            differ_notes.append((style, label, len(texts) - same, ties))
            tok_rate = useful * items / n / secs
            lines.append(f"| {style} | {label} | {items} | {secs:.2f} | {items / secs:.2f} | {tok_rate:.1f} | "
                         f"{rate_e / (items / secs):.1f}x | {same}/{len(texts)} |")
        if len(runs) > 1:
            def spread(base_rate: float) -> str:
                return "-".join(f"{n / t / base_rate:.1f}x" for t in (max(times), min(times)))

            engine_notes.append(
                f"- {style}: the engine's runs took {', '.join(f'{t:.2f}' for t in times)} s (in run order); "
                f"over those runs its speed-up is {spread(n_plain / t_a)} over plain and "
                f"{spread(n / t_b)} over batched `generate`; "
                + ("every run gave the same completions." if not unstable else
                   f"{unstable} completion(s) differed between runs (a bug: the engine is deterministic)."))
        peaks.append((f"{style} timings", _peak_mb()))
    lines.append("")
    if engine_notes:
        lines += engine_notes + [""]
    for style, label, differ, ties in differ_notes:
        if differ:
            lines.append(f"- {style}, {label}: {differ} completion(s) differ from the engine's, "
                         f"{ties} of them where the engine recorded a near-tie (margin < {TIE_MARGIN:g}).")
    if not any(d for _, _, d, _ in differ_notes):
        lines.append("Every completion of every method equals the engine's, byte for byte.")
    lines.append("")

    steps = 16 if args.quick else 32
    later_rates = machine_rates(args.quick)
    bandwidth, gflops = max(start_rates[0], later_rates[0]), max(start_rates[1], later_rates[1])
    lines[lines.index("{machine}")] = (
        f"Machine: memory read {bandwidth:.1f} GB/s, float32 matmul {gflops:.1f} GFLOP/s (best "
        f"repetition; at the start {start_rates[0]:.1f} GB/s and {start_rates[1]:.1f} GFLOP/s, before "
        f"the decode table {later_rates[0]:.1f} and {later_rates[1]:.1f}; the higher of each is used).")
    bw_bound = bandwidth * 1e9 / weight_bytes
    lines += ["| decode batch | tokens/s | GFLOP/s | share of the compute bound | share of the bandwidth bound |",
              "| ---: | ---: | ---: | ---: | ---: |"]
    for batch in ((1, 8) if args.quick else (1, 32, 128)):
        probe = build_prompts(tok, "worked", 4, batch)
        rate = decode_rate(model, tok, probe, batch, steps)
        # A step reads the weights once for all its rows: the bandwidth bound grows with the batch.
        lines.append(f"| {batch} | {rate:.1f} | {rate * 2 * n_params / 1e9:.1f} | "
                     f"{100 * rate * 2 * n_params / (gflops * 1e9):.1f}% | {100 * rate / (batch * bw_bound):.1f}% |")
    lines += ["", f"Compute bound: 2 x {n_params / 1e6:.3g}M parameters FLOPs per token at the matmul rate, "
              f"{gflops * 1e9 / (2 * n_params):.0f} tokens/s; bandwidth bound: the weights "
              f"({weight_bytes / 1e6:.3g} MB) read once per step, {bw_bound:.1f} tokens/s per row of the batch. "
              "The lower of the two is the one that binds at that batch.", ""]
    peaks.append(("decode table", _peak_mb()))
    lines += bound_table(model, works, rates, gflops, layer_rate(model))

    lines += ["| direct shots | questions | seconds per item |", "| ---: | ---: | ---: |"]
    for shots in ((2, 8) if args.quick else (2, 4, 8)):
        for q in sorted({max(1, n // 4), n}):
            prompts = build_prompts(tok, "direct", shots, q)
            _, t = _clock(lambda: greedy_generate(model, tok, prompts, max_new_tokens=24, stop=STOP))
            lines.append(f"| {shots} | {q} | {t / q:.3f} |")
    lines.append("")
    peaks.append(("shots table", _peak_mb()))

    bf = model.to(torch.bfloat16)
    lines += ["| style | bfloat16 items/s | completions changed vs float32 |", "| --- | ---: | ---: |"]
    n_bf = min(n, 32)  # bfloat16 is slow on CPUs without bfloat16 units: a subset tells enough
    for style, (shots, max_new) in STYLES.items():
        prompts = build_prompts(tok, style, shots, n_bf)
        got, t = _clock(lambda: greedy_generate(bf, tok, prompts, max_new_tokens=max_new, stop=STOP))
        changed = sum(g.text != f for g, f in zip(got, f32_texts[style]))
        lines.append(f"| {style} | {n_bf / t:.2f} | {changed}/{n_bf} |")
    peaks.append(("bfloat16", _peak_mb()))
    lines += ["", f"Peak resident memory: {peaks[-1][1]:.0f} MB (the peak so far after each part: "
              + ", ".join(f"{part} {mb:.0f}" for part, mb in peaks) + ").", ""]
    if not args.model_folder and not args.quick:
        del bf, model
        lines += second_loads() + [""]
    cores = others.cores()
    lines += [f"Other processes used {cores:.2f} cores' worth of CPU on average during the benchmark "
              f"(of {os.cpu_count()}; psutil's counters, this process subtracted): "
              + ("a quiet machine." if cores < BUSY_CORES else "a busy machine, so these timings are unreliable.")]
    print("\n".join(lines))


if __name__ == "__main__":
    main()
