"""The fast greedy engine against plain one-at-a-time ``generate`` (transformers), on tiny models.

The outside reference is transformers' own ``generate`` (greedy, no stop strings), run one
prompt at a time by ``reference_generate``; the engine must give byte-identical completions
in float32 except where the reference itself met a near-tie (margin under TIE_MARGIN).
"""

from __future__ import annotations

import math

import pytest
import torch
from transformers import AutoModelForCausalLM, AutoTokenizer

from evalkit.backends import engine as engine_mod
from evalkit.backends.engine import (TIE_MARGIN, Generation, auto_batch_size, common_prefix_length,
                                     greedy_generate, kv_bytes_per_token, shared_prefix_length)
from evalkit.backends.kvslab import ATTENTION_NAME, Slab
from evalkit.backends.reference import reference_generate, reference_trace
from evalkit.errors import BackendError
from tests.tiny import build_tiny_model

HEAD = ("You are a careful assistant.\n\n"
        "Question: A spoke costs 3 coins; a new chain costs 27 coins. How many coins for 4 spokes?\n"
        "Answer: 12\n\n"
        "Question: The ferry leaves at 09:15 and the crossing takes 45 minutes. When does it arrive?\n"
        "Answer: 10:00\n\n")
QUESTIONS = [
    "How many?",
    "The mechanic trued 5 wheels before lunch and 7 after lunch. How many wheels?",
    "What is the total?",
    "The seed nursery sowed 120 trays with 24 seedlings each. How many seedlings?",
    "If each tray holds 6 pots and there are 8 trays, how many pots are there?",
    "x",
    "The timetable lists 6 sailings a day, 7 days a week. How many sailings?",
    "First, 3 + 4 = 7. Then 7 * 2?",
    "The bike-repair workshop fixed 14 punctures on Monday and 9 on Tuesday. How many in all?",
    "45 - 18 = ?",
    "A new chain costs 27 coins.",
    "How many pots for 100 trays of 25?",
    "Is it 1000 or 50?",
    "The answer is",
]
PROMPTS = [HEAD + "Question: " + q + "\nAnswer:" for q in QUESTIONS]
MAX_NEW = 24


@pytest.fixture(scope="module", autouse=True)
def _one_thread():
    # Tiny models gain nothing from threads, and on a shared 2-core machine waiting threads
    # make every small kernel call many times slower.
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def _load(folder, **kw):
    model = AutoModelForCausalLM.from_pretrained(folder, **kw).eval()
    return model, AutoTokenizer.from_pretrained(folder)


@pytest.fixture(scope="module")
def llama(tmp_path_factory):
    return _load(build_tiny_model(tmp_path_factory.mktemp("llama"), arch="llama", seed=0))


@pytest.fixture(scope="module")
def gemma(tmp_path_factory):
    # tests/tiny.py's gemma3 ties input and output embeddings; with Gemma's embedding scaling
    # its greedy output repeats one token whatever the context, which would hide a wrong
    # sliding window. Same config and tokenizer, untied, gives context-dependent text.
    folder = build_tiny_model(tmp_path_factory.mktemp("gemma"), arch="gemma3", seed=0)
    tok = AutoTokenizer.from_pretrained(folder)
    config = AutoModelForCausalLM.from_pretrained(folder).config
    config.tie_word_embeddings = False
    torch.manual_seed(0)
    model = AutoModelForCausalLM.from_config(config).eval()
    return model, tok


def _stops_across_tokens(model, tok, prompts, n=2):
    """Two-character stop strings that straddle a token boundary inside real completions."""
    stops = []
    for p in prompts:
        ids, _, _ = reference_trace(model, tok, p, max_new_tokens=MAX_NEW)
        for k in range(4, len(ids) - 1):
            b = len(tok.decode(ids[:k], skip_special_tokens=True))
            full = tok.decode(ids[:k + 1], skip_special_tokens=True)
            s = full[b - 1:b + 1]
            if len(s) == 2 and "\ufffd" not in s and s.isprintable() and s not in stops:
                stops.append(s)
                break
        if len(stops) == n:
            return stops
    raise AssertionError("no completion long enough to take stop strings from")


def _compare(got: list[Generation], ref: list[Generation]) -> int:
    """Assert equality except flagged ties; return the number of ties."""
    assert len(got) == len(ref)
    ties = 0
    for i, (g, r) in enumerate(zip(got, ref)):
        assert g.prompt_tokens == r.prompt_tokens, i
        same = (g.text, g.new_tokens, g.finish) == (r.text, r.new_tokens, r.finish)
        if not same:
            assert min(r.min_margin, g.min_margin) < TIE_MARGIN, (i, g, r)
            ties += 1
            continue
        # The same tokens were chosen from logits that agree to float32 rounding.
        assert math.isclose(g.min_margin, r.min_margin, abs_tol=1e-4), (i, g.min_margin, r.min_margin)
    return ties


@pytest.fixture(scope="module")
def llama_case(llama):
    model, tok = llama
    stop = _stops_across_tokens(model, tok, PROMPTS[:6])
    ref = reference_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop)
    return stop, ref


def test_reference_case_exercises_every_ending(llama_case):
    stop, ref = llama_case
    finishes = {r.finish for r in ref}
    assert "stop" in finishes and "length" in finishes
    # Stop strings were taken across token boundaries, and are excluded from the text.
    assert all(not any(s in r.text for s in stop) for r in ref)


def test_cut_follows_plain_string_search(llama, llama_case):
    # Engine and reference share the cutting rule, so check the rule itself against str.find
    # on the full decoded completion.
    model, tok = llama
    stop, ref = llama_case
    for p, r in zip(PROMPTS, ref):
        ids, _, _ = reference_trace(model, tok, p, max_new_tokens=MAX_NEW)
        full = tok.decode(ids, skip_special_tokens=True)
        hits = [full.find(s) for s in stop if s in full]
        if not hits:
            assert (r.text, r.new_tokens, r.finish) == (full, len(ids), "length")
            continue
        assert r.finish == "stop" and r.text == full[:min(hits)]
        before = tok.decode(ids[:r.new_tokens - 1], skip_special_tokens=True)
        upto = tok.decode(ids[:r.new_tokens], skip_special_tokens=True)
        assert not any(s in before for s in stop) and any(s in upto for s in stop)


@pytest.mark.parametrize("batch_size", [1, 3, 8])
@pytest.mark.parametrize("reuse_prefix", [True, False])
@pytest.mark.parametrize("form", ["mkl", "onednn", None], ids=["packed-mkl", "packed-onednn", "unpacked"])
@pytest.mark.parametrize("direct_pass", [True, False], ids=["llama_pass", "model_call"])
def test_engine_equals_reference(llama, llama_case, batch_size, reuse_prefix, form, direct_pass,
                                 monkeypatch):
    from evalkit.backends import linear_order, llama_pass

    pack = form is not None
    if pack:
        monkeypatch.setenv("EVALKIT_PACK", form)
        if linear_order.packing_form() != form:
            pytest.skip(f"this torch has no {form} packed linear operators")
    model, tok = llama
    stop, ref = llama_case
    calls, used = [], []
    monkeypatch.setattr(engine_mod, "should_pack", lambda m, available: calls.append(available) or pack)
    applies = llama_pass.applies
    monkeypatch.setattr(llama_pass, "applies", lambda m: used.append(applies(m)) or (direct_pass and used[-1]))
    got = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop,
                          batch_size=batch_size, reuse_prefix=reuse_prefix)
    assert calls and calls[0] > 0  # asked once per call, with the memory available
    assert used and all(used)  # the tiny llama qualifies for the direct pass at every forward call
    assert _compare(got, ref) <= 1


def test_plain_own_attention_at_many_rows_equals_reference(llama, llama_case, monkeypatch):
    # Decode steps of at least OWN_PLAIN_ROWS rows take the own part of attention as plain
    # products; a threshold of 2 makes this run's steps take it.
    from evalkit.backends import split_attention

    model, tok = llama
    stop, ref = llama_case
    monkeypatch.setattr(split_attention, "OWN_PLAIN_ROWS", 2)
    plain = []
    real_plain = split_attention._plain
    monkeypatch.setattr(split_attention, "_plain", lambda *a: plain.append(1) or real_plain(*a))
    got = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop, batch_size=8)
    assert plain  # the path was taken
    assert _compare(got, ref) <= 1


def test_batch_refills_and_matches(llama, llama_case, monkeypatch):
    model, tok = llama
    stop, ref = llama_case
    joined, left = [], []  # rows running when new rows joined; rows kept when rows left
    real_admit, real_retain = Slab.admit, Slab.retain

    def admit(self, src, keep):
        joined.append(self.rows)
        return real_admit(self, src, keep)

    def retain(self, keep):
        left.append((self.rows, len(keep)))
        return real_retain(self, keep)

    monkeypatch.setattr(Slab, "admit", admit)
    monkeypatch.setattr(Slab, "retain", retain)
    got = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop, batch_size=4)
    # 14 questions through 4 rows: fresh rows joined running ones, and ended rows left.
    assert sum(n > 0 for n in joined) >= 2
    assert any(kept < n for n, kept in left)
    assert _compare(got, ref) <= 1


def test_regroup_rules():
    from evalkit.backends.engine import regroup

    # 64 rows: waiting questions join once 16 rows are free (a quarter), or when none is live.
    assert regroup(64, 49, 10, 64, full=False) == ""
    assert regroup(64, 48, 10, 64, full=False) == "join"
    assert regroup(3, 0, 10, 64, full=False) == "join"
    assert regroup(0, 0, 10, 64, full=False) == "join"  # the first batch
    # Nobody waits: ended rows leave once they are a quarter of the batch, or none is live.
    assert regroup(40, 31, 0, 64, full=False) == ""
    assert regroup(40, 30, 0, 64, full=False) == "leave"
    assert regroup(2, 0, 0, 64, full=False) == "leave"
    assert regroup(40, 40, 0, 64, full=False) == ""
    # An ended row that has used all its columns leaves at once, waiting or not.
    assert regroup(64, 63, 10, 64, full=True) == "leave"
    assert regroup(40, 39, 0, 64, full=True) == "leave"


def test_rows_move_down_in_place_and_keep_their_columns():
    from evalkit.backends.kvslab import _moves

    # Every pattern of kept rows out of 7: applying the block moves in order to a list of
    # rows gives the kept rows, in order, at the front (the sources are never overwritten
    # before they are read), and no move overlaps its own source.
    import itertools

    for r in range(8):
        for keep in itertools.combinations(range(7), r):
            data = list(range(7))
            for dst, src, n in _moves(list(keep)):
                assert dst < src and (dst + n <= src)
                data[dst:dst + n] = data[src:src + n]
            assert data[:len(keep)] == list(keep)


def test_later_calls_reuse_the_key_value_memory(llama, llama_case):
    from evalkit.backends.arena import arena_for, release

    model, tok = llama
    stop, ref = llama_case
    release(model)
    first = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop, batch_size=5)
    blocks = {use: arena_for(model, use).block.data_ptr() for use in ("prefix", "rows", "prefill")}
    second = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop, batch_size=5)
    assert {use: arena_for(model, use).block.data_ptr() for use in blocks} == blocks
    assert [g.text for g in second] == [g.text for g in first]
    assert _compare(second, ref) <= 1
    assert release(model) > 0


def test_eos_ends_rows(llama):
    model, tok = llama
    ids, _, _ = reference_trace(model, tok, PROMPTS[1], max_new_tokens=MAX_NEW)
    saved = model.generation_config.eos_token_id
    model.generation_config.eos_token_id = ids[5]  # a token the model really emits
    try:
        ref = reference_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW)
        got = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, batch_size=5)
    finally:
        model.generation_config.eos_token_id = saved
    assert ref[1].finish == "eos" and ref[1].new_tokens <= 6
    assert _compare(got, ref) <= 1


def test_runs_are_deterministic(llama, llama_case):
    model, tok = llama
    stop, _ = llama_case
    a = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop, batch_size=5)
    b = greedy_generate(model, tok, PROMPTS, max_new_tokens=MAX_NEW, stop=stop, batch_size=5)
    assert [(g.text, g.new_tokens, g.min_margin, g.finish) for g in a] == \
        [(g.text, g.new_tokens, g.min_margin, g.finish) for g in b]


def test_common_prefix_is_taken_over_tokens_not_text(llama):
    model, tok = llama
    # A shared text ending in a space: alone it tokenises with a trailing space token, inside
    # the prompts the space joins the next word; only a token-level prefix is safe to reuse.
    prompts = ["The answer is 14", "The answer is 2880"]
    enc = tok(prompts, add_special_tokens=False)["input_ids"]
    alone = tok("The answer is ", add_special_tokens=False)["input_ids"]
    assert enc[0][:len(alone)] != alone
    assert common_prefix_length(enc) < len(alone)
    ref = reference_generate(model, tok, prompts, max_new_tokens=8)
    assert _compare(greedy_generate(model, tok, prompts, max_new_tokens=8), ref) == 0


def test_shared_prefix_leaves_every_prompt_a_token_of_its_own():
    assert shared_prefix_length([[5, 6, 7]]) == 0                      # one prompt: nothing shared
    assert shared_prefix_length([[5, 6, 7, 8], [5, 6, 9]]) == 2        # the common tokens
    assert shared_prefix_length([[5, 6, 7], [5, 6, 7, 8]]) == 2        # one prompt is the other's prefix
    assert shared_prefix_length([[5, 6], [5, 6]]) == 1                 # identical prompts
    assert shared_prefix_length([[1, 2], [3, 4]]) == 0


def test_one_new_token_and_single_prompt(llama):
    model, tok = llama
    ref = reference_generate(model, tok, PROMPTS[:3], max_new_tokens=1)
    got = greedy_generate(model, tok, PROMPTS[:3], max_new_tokens=1, batch_size=2)
    assert _compare(got, ref) == 0 and all(g.new_tokens == 1 for g in got)
    one = greedy_generate(model, tok, PROMPTS[:1], max_new_tokens=MAX_NEW)
    assert _compare(one, reference_generate(model, tok, PROMPTS[:1], max_new_tokens=MAX_NEW)) == 0


def test_eager_model_matches_and_keeps_its_attention(tmp_path):
    folder = build_tiny_model(tmp_path / "m", arch="llama", seed=1)
    model, tok = _load(folder, attn_implementation="eager")
    ref = reference_generate(model, tok, PROMPTS[:8], max_new_tokens=12)
    got = greedy_generate(model, tok, PROMPTS[:8], max_new_tokens=12, batch_size=3)
    assert _compare(got, ref) <= 1
    # The engine's own attention is selected only while it runs.
    assert model.config._attn_implementation == "eager"


@pytest.fixture(scope="module")
def gemma_ref(gemma):
    model, tok = gemma
    return reference_generate(model, tok, PROMPTS, max_new_tokens=16)


@pytest.mark.parametrize("batch_size,reuse_prefix", [(3, True), (8, False)])
def test_gemma3_sliding_window_equals_reference(gemma, gemma_ref, batch_size, reuse_prefix):
    model, tok = gemma
    window = model.config.sliding_window
    kinds = set(model.config.layer_types)
    assert kinds == {"sliding_attention", "full_attention"}
    # Prompts far longer than the window: a window counted in columns rather than real
    # tokens (padding, gaps) would change the text.
    assert min(len(tok(p)["input_ids"]) for p in PROMPTS) > 4 * window
    got = greedy_generate(model, tok, PROMPTS, max_new_tokens=16, batch_size=batch_size,
                          reuse_prefix=reuse_prefix)
    assert _compare(got, gemma_ref) <= 1


def test_bfloat16_model_runs(llama):
    model, tok = llama
    bf = AutoModelForCausalLM.from_config(model.config).eval()
    bf.load_state_dict(model.state_dict())
    bf = bf.to(torch.bfloat16)
    bf.generation_config = model.generation_config
    got = greedy_generate(bf, tok, PROMPTS, max_new_tokens=12, batch_size=4)
    again = greedy_generate(bf, tok, PROMPTS, max_new_tokens=12, batch_size=4)
    assert [g.text for g in got] == [g.text for g in again]
    assert all(g.finish == "length" and g.new_tokens == 12 for g in got)
    # Same code path as float32: a batch of one continues the prefix like the reference.
    ref = reference_generate(bf, tok, PROMPTS[:2], max_new_tokens=12)
    assert [g.prompt_tokens for g in got[:2]] == [r.prompt_tokens for r in ref]


def test_callbacks_and_seconds(llama):
    model, tok = llama
    seen, ticks = [], []
    got = greedy_generate(model, tok, PROMPTS, max_new_tokens=6, batch_size=4,
                          on_result=lambda i, g: seen.append((i, g.text)), progress=ticks.append)
    assert sorted(i for i, _ in seen) == list(range(len(PROMPTS)))
    assert dict(seen) == {i: g.text for i, g in enumerate(got)}
    assert sum(ticks) == len(PROMPTS)
    assert all(g.seconds > 0 for g in got)


def test_key_value_bytes_match_the_cache(llama):
    model, tok = llama
    from evalkit.backends.kvslab import AttentionPlan

    ids = tok(PROMPTS[0], add_special_tokens=False)["input_ids"]
    before, model.config._attn_implementation = model.config._attn_implementation, ATTENTION_NAME
    try:
        prefix = Slab.for_prefix(model, AttentionPlan(model), ids, chunk=16)
    finally:
        model.config._attn_implementation = before
    held = sum(k.nbytes + v.nbytes for k, v in prefix)
    assert held == kv_bytes_per_token(model) * len(ids)
    assert auto_batch_size(model, 200, n_prompts=3) == 3
    assert 1 <= auto_batch_size(model, 10**9, n_prompts=100) <= 32


def test_user_errors(llama):
    model, tok = llama
    with pytest.raises(BackendError, match="max_new_tokens"):
        greedy_generate(model, tok, PROMPTS, max_new_tokens=0)
    with pytest.raises(BackendError, match="empty"):
        greedy_generate(model, tok, ["Question:", ""], max_new_tokens=4)
    assert greedy_generate(model, tok, [], max_new_tokens=4) == []


@pytest.mark.parametrize("arch", ["qwen3", "mistral", "qwen2", "gemma2"])
def test_other_architectures_equal_reference(llama, arch):
    # Qwen3: query/key norms; Mistral: one window for all layers, no layer_types; Qwen2: full and
    # sliding layers mixed; Gemma2: attention logit soft-capping. Tokenizer from the tiny llama.
    import transformers

    _, tok = llama
    common = dict(vocab_size=len(tok), hidden_size=32, intermediate_size=64, num_hidden_layers=2,
                  num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=1024,
                  initializer_range=0.3, eos_token_id=tok.eos_token_id, pad_token_id=tok.pad_token_id,
                  bos_token_id=None, tie_word_embeddings=False)
    config = {
        "qwen3": lambda: transformers.Qwen3Config(**common, head_dim=8),
        "mistral": lambda: transformers.MistralConfig(**common, sliding_window=12),
        "qwen2": lambda: transformers.Qwen2Config(**common, use_sliding_window=True, sliding_window=12,
                                                  max_window_layers=1),
        "gemma2": lambda: transformers.Gemma2Config(**common, head_dim=8, sliding_window=12),
    }[arch]()
    torch.manual_seed(0)
    model = AutoModelForCausalLM.from_config(config).eval()
    ref = reference_generate(model, tok, PROMPTS[:8], max_new_tokens=12)
    got = greedy_generate(model, tok, PROMPTS[:8], max_new_tokens=12, batch_size=3)
    assert len({r.text for r in ref}) > 4  # context-dependent text, not one repeated token
    assert _compare(got, ref) <= 1


@pytest.mark.parametrize("vocab", [1000, 4096, 49152, 1009], ids=["2-blocks", "4-blocks", "smollm2", "prime"])
def test_greedy_pick_equals_argmax_including_exact_ties(vocab):
    # torch.argmax (what generate's greedy step uses) returns the first maximal index;
    # greedy_pick must agree everywhere, exact ties included, and report the top-2 gap
    # (torch.topk's values are the reference for the gap). A prime vocabulary has no block
    # size and takes the whole-row scan.
    g = torch.Generator().manual_seed(vocab)
    logits = torch.randn(64, vocab, generator=g)
    blk = engine_mod.pick_block(vocab)
    assert (blk is None) == (vocab == 1009)
    b = blk or 100
    logits[3, 10] = logits[3, vocab - 100] = logits[3].max() + 1.0  # exact tie, ids far apart
    logits[7, :] = 0.0                                              # everything tied
    logits[9, vocab - 2] = logits[9, vocab - 1] = 50.0              # tie at the end of the vocabulary
    logits[11, b - 1] = logits[11, b] = 40.0                        # tie across a block boundary
    logits[12, b + 1] = logits[12, b + 5] = 40.0                    # tie inside one block
    logits[13, 2] = 30.0                                            # second best in the best block...
    logits[13, 1] = 29.5
    logits[13, vocab - 1] = 29.75                                   # ...but the runner-up is in another
    logits[14, vocab - 1] = 30.0                                    # the best in the last block
    toks, gaps = engine_mod.greedy_pick(logits)
    assert toks == logits.argmax(dim=-1).tolist()
    assert gaps[3] == gaps[7] == gaps[9] == gaps[11] == gaps[12] == 0.0
    assert gaps[13] == 0.25
    top = torch.topk(logits, 2, dim=-1).values
    assert gaps == (top[:, 0] - top[:, 1]).tolist()
    one_tok, one_gap = engine_mod.greedy_pick(logits[13:14])  # a single row, as batch-1 decoding has
    assert (one_tok, one_gap) == ([toks[13]], [0.25])


def test_transposed_output_projection_blocks_give_the_same_bits():
    """A wide output projection is laid out in rows block by block (linear_order.CONTIGUOUS_BLOCK):
    every logit is the same dot product as in one unblocked product, so the bits must match."""
    from evalkit.backends import linear_order

    class Head(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.out = torch.nn.Linear(24, 3 * linear_order.CONTIGUOUS_BLOCK + 5)  # last block partial

        def get_output_embeddings(self):
            return self.out

    m = Head()
    g = torch.Generator().manual_seed(2)
    for rows in (3, 9, 31):
        x = torch.randn(rows, 1, 24, generator=g)
        with linear_order.engine_linears(m):
            got = m.out(x)
        whole = linear_order._product(m.out.weight, m.out.bias, torch.nn.functional.pad(
            x.reshape(rows, 24), (0, 0, 0, linear_order.padded_rows(rows) - rows)).t())[:, :rows].t()
        assert got.is_contiguous() and torch.equal(got.reshape(rows, -1), whole)
        torch.testing.assert_close(got, torch.nn.functional.linear(x, m.out.weight, m.out.bias),
                                   rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("form", ["mkl", "onednn"])
def test_packed_linears_equal_nn_linear_and_restore(llama, form, monkeypatch):
    from evalkit.backends import linear_order

    monkeypatch.setenv("EVALKIT_PACK", form)
    if linear_order.packing_form() != form:
        pytest.skip(f"this torch has no {form} packed linear operators")
    model = llama[0]
    lin = next(m for m in model.modules() if type(m) is torch.nn.Linear)
    head = model.get_output_embeddings()
    g = torch.Generator().manual_seed(3)
    for rows in (1, 3, 9, 31, 300):
        x = torch.randn(rows, 1, lin.in_features, generator=g)
        h = torch.randn(rows, 1, head.in_features, generator=g)
        with linear_order.engine_linears(model, pack=True) as n:
            assert n > 0 and "forward" in vars(lin)
            got, logits = lin(x), head(h)
        assert got.shape == x.shape[:-1] + (lin.out_features,)
        # Reference: torch's own nn.Linear (MKL) on the same weights; same sums, other order.
        torch.testing.assert_close(got, torch.nn.functional.linear(x, lin.weight, lin.bias), rtol=1e-5, atol=1e-5)
        torch.testing.assert_close(logits, torch.nn.functional.linear(h, head.weight, head.bias),
                                   rtol=1e-5, atol=1e-5)
        assert logits.is_contiguous()
    assert "forward" not in vars(lin) and "forward" not in vars(head)


@pytest.mark.parametrize("form", ["mkl", "onednn"])
def test_packed_weight_is_kept_and_packed_again_when_the_weight_changes(form, monkeypatch):
    from evalkit.backends import linear_order

    monkeypatch.setenv("EVALKIT_PACK", form)
    if linear_order.packing_form() != form:
        pytest.skip(f"this torch has no {form} packed linear operators")
    lin = torch.nn.Linear(16, 40)
    first = linear_order.packed_weight(lin)
    assert linear_order.packed_weight(lin) is first  # made once
    with torch.no_grad():
        lin.weight.mul_(-2.0)  # changed in place: its version counter moves
    again = linear_order.packed_weight(lin)
    assert again is not first
    x = torch.randn(5, 16)
    with linear_order.engine_linears(lin, pack=True):
        got = lin(x)
    torch.testing.assert_close(got, torch.nn.functional.linear(x, lin.weight, lin.bias), rtol=1e-5, atol=1e-5)
    with torch.no_grad():
        lin.weight = torch.nn.Parameter(torch.randn(40, 16))  # replaced by another tensor
    third = linear_order.packed_weight(lin)
    assert third is not again
    lin.weight.data = torch.randn(40, 16)  # same tensor object, new data
    assert linear_order.packed_weight(lin) is not third
    with linear_order.engine_linears(lin, pack=True):
        got = lin(x)
    torch.testing.assert_close(got, torch.nn.functional.linear(x, lin.weight, lin.bias), rtol=1e-5, atol=1e-5)


def test_packing_form_by_vendor_and_by_hand(monkeypatch):
    from evalkit.backends import linear_order

    monkeypatch.delenv("EVALKIT_PACK", raising=False)
    if not (linear_order._form_available("mkl") and linear_order._form_available("onednn")):
        pytest.skip("this torch lacks MKL's or oneDNN's packed linear operators")
    monkeypatch.setattr(linear_order, "_cpu_vendor", lambda: "GenuineIntel")
    assert linear_order.packing_form() == "mkl"
    monkeypatch.setattr(linear_order, "_cpu_vendor", lambda: "AuthenticAMD")
    assert linear_order.packing_form() == "onednn"  # MKL's packed products not measured there
    for choice, expected in (("mkl", "mkl"), ("ONEDNN", "onednn"), ("none", None), ("fast", None)):
        monkeypatch.setenv("EVALKIT_PACK", choice)
        assert linear_order.packing_form() == expected and linear_order.packing_available() == (expected is not None)


def test_mkl_packing_is_checked_before_use_and_oneDNN_taken_if_it_disagrees(llama, monkeypatch):
    """MKL's packed weight is made for 512 rows and used at any row count; before a model's first
    use the engine checks it against x @ W.T (torch's nn.Linear as the reference)."""
    from evalkit.backends import linear_order

    monkeypatch.setenv("EVALKIT_PACK", "mkl")
    if not (linear_order._form_available("mkl") and linear_order._form_available("onednn")):
        pytest.skip("this torch lacks MKL's or oneDNN's packed linear operators")
    fresh = AutoModelForCausalLM.from_config(llama[0].config).eval()
    assert linear_order.mkl_packing_agrees(fresh)
    lin = next(m for m in fresh.modules() if type(m) is torch.nn.Linear)
    with linear_order.engine_linears(fresh, pack=True):
        assert lin.forward.keywords["form"] == "mkl"
    # A layout that depended on the row count would give wrong products: then oneDNN is used.
    other = AutoModelForCausalLM.from_config(llama[0].config).eval()
    real = linear_order._mkl_product
    monkeypatch.setattr(linear_order, "_mkl_product", lambda m, x, p: real(m, x, p) + (x.shape[0] == 17))
    assert not linear_order.mkl_packing_agrees(other)
    lin = next(m for m in other.modules() if type(m) is torch.nn.Linear)
    x = torch.randn(5, lin.in_features)
    with linear_order.engine_linears(other, pack=True):
        assert lin.forward.keywords["form"] == "onednn"
        got = lin(x)
    torch.testing.assert_close(got, torch.nn.functional.linear(x, lin.weight, lin.bias), rtol=1e-5, atol=1e-5)


def test_should_pack_only_float32_that_fits_in_memory(llama):
    from evalkit.backends import linear_order

    if not linear_order.packing_available():
        pytest.skip("this torch has no oneDNN packed linear operators")
    model = llama[0]
    fresh = AutoModelForCausalLM.from_config(model.config).eval()  # nothing packed for it yet
    weights = sum(m.weight.nbytes for m in fresh.modules() if type(m) is torch.nn.Linear)
    assert linear_order.should_pack(fresh, available_bytes=4 * weights)
    assert not linear_order.should_pack(fresh, available_bytes=2 * weights)  # copies would take half
    assert not linear_order.should_pack(fresh.to(torch.bfloat16), available_bytes=1 << 40)


def test_transposed_linears_equal_nn_linear_and_restore(llama):
    from evalkit.backends.linear_order import MAX_TRANSPOSED_ROWS, engine_linears, padded_rows

    # Padded row counts: never fewer rows than asked, never more than 7 extra.
    assert [padded_rows(r) for r in (1, 2, 3, 4, 5, 8, 9, 31, 32, 33)] == [2, 2, 4, 4, 8, 8, 16, 32, 32, 40]
    model = llama[0]
    lin = next(m for m in model.modules() if type(m) is torch.nn.Linear)
    g = torch.Generator().manual_seed(1)
    for rows in (1, 3, 5, 9, 31, MAX_TRANSPOSED_ROWS + 1):  # padded (1-31 rows) and plain
        x = torch.randn(rows, 1, lin.in_features, generator=g)
        want = torch.nn.functional.linear(x, lin.weight, lin.bias)
        head = model.get_output_embeddings()
        with engine_linears(model) as n:
            assert n > 0 and "forward" in vars(lin)
            got = lin(x)
            logits = head(torch.randn(rows, 1, head.in_features, generator=g))
        assert got.shape == want.shape
        torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-5)  # same sums, other order
        assert logits.is_contiguous()  # the vocabulary scan wants the logits laid out in rows
    assert "forward" not in vars(lin) and "forward" not in vars(head)
    assert torch.equal(lin(x), torch.nn.functional.linear(x, lin.weight, lin.bias))  # nn.Linear's own again


def test_one_row_product_splits_by_thread_and_equals_nn_linear(llama):
    """One row (batch-1 decode) is computed as one slice of the weight's output rows per thread
    (linear_order.one_row); checked against torch's own nn.Linear on the same weights."""
    from evalkit.backends import linear_order

    before = torch.get_num_threads()
    g = torch.Generator().manual_seed(4)
    try:
        torch.set_num_threads(2)
        for out, k, bias in ((40, 24, True), (192, 576, False), (1536, 576, False), (576, 1536, True)):
            w, b, x = torch.randn(out, k, generator=g), torch.randn(out, generator=g), torch.randn(k, generator=g)
            got = linear_order.one_row(w, b if bias else None, x)
            assert got.shape == (out,) and got.is_contiguous()
            torch.testing.assert_close(got, torch.nn.functional.linear(x, w, b if bias else None),
                                       rtol=1e-5, atol=1e-4)
        w = torch.randn(41, 24, generator=g)
        assert linear_order.one_row(w, None, torch.randn(24)) is None           # 41 rows: no even split
        assert linear_order.one_row(w[:40].t().contiguous().t(), None, torch.randn(24)) is None  # not contiguous
        model = llama[0]
        lin = next(m for m in model.modules() if type(m) is torch.nn.Linear)
        head = model.get_output_embeddings()
        x = torch.randn(1, 1, lin.in_features, generator=g)
        h = torch.randn(1, 1, head.in_features, generator=g)
        for pack in (False, True):
            with linear_order.engine_linears(model, pack=pack):
                got, logits = lin(x), head(h)
            # The engine's one-row path is this function, bit for bit.
            assert torch.equal(got.reshape(-1), linear_order.one_row(lin.weight, lin.bias, x.reshape(-1)))
            assert got.shape == (1, 1, lin.out_features) and logits.is_contiguous()
            torch.testing.assert_close(logits, torch.nn.functional.linear(h, head.weight, head.bias),
                                       rtol=1e-5, atol=1e-4)
        torch.set_num_threads(1)
        assert linear_order.one_row(lin.weight, lin.bias, x.reshape(-1)) is None  # nothing to split over
    finally:
        torch.set_num_threads(before)


def _slab_logits(model, tok, direct: bool, monkeypatch):
    """Prefix, one padded prefill group and three decode steps through Slab.extend, with the
    direct llama pass or with model(...): every logit and every cached key/value."""
    from evalkit.backends import llama_pass
    from evalkit.backends.kvslab import AttentionPlan

    monkeypatch.setattr(llama_pass, "applies", lambda m: direct)
    enc = tok(PROMPTS[:4], add_special_tokens=False)["input_ids"]
    P = common_prefix_length(enc)
    plan, out = AttentionPlan(model), []
    saved = model.config._attn_implementation
    model.config._attn_implementation = ATTENTION_NAME
    try:
        with torch.inference_mode():
            prefix = Slab.for_prefix(model, plan, enc[0][:P], 7)  # several chunks
            sufs = [e[P:] for e in enc]
            S = max(len(s) for s in sufs)
            slab = Slab(plan, len(sufs), S + 3, prefix, "cpu")
            ids = torch.zeros((len(sufs), S), dtype=torch.long)
            pos = torch.zeros((len(sufs), S), dtype=torch.long)
            real = torch.zeros((len(sufs), S), dtype=torch.bool)
            for j, s in enumerate(sufs):
                ids[j, S - len(s):] = torch.tensor(s)
                pos[j, S - len(s):] = torch.arange(P, P + len(s))
                real[j, S - len(s):] = True
            logits = slab.extend(model, ids, pos, real)
            out.append(logits)
            for step in range(3):
                nxt = logits.argmax(-1)[:, None]
                logits = slab.extend(model, nxt, pos[:, -1:] + step + 1)
                out.append(logits)
            out += [t for k, v in prefix for t in (k, v)]
            out += [t for layer in slab.layers for t in (layer.keys, layer.values)]
    finally:
        model.config._attn_implementation = saved
    return out


def test_llama_pass_gives_the_bits_of_the_model_call(llama, monkeypatch):
    # Outside reference: transformers' own LlamaForCausalLM.forward, through the same cache.
    model, tok = llama
    direct = _slab_logits(model, tok, True, monkeypatch)
    called = _slab_logits(model, tok, False, monkeypatch)
    assert len(direct) == len(called)
    for a, b in zip(direct, called):
        assert torch.equal(a, b)


def test_llama_pass_only_where_it_computes_the_same(llama, tmp_path):
    from evalkit.backends import llama_pass

    model, _ = llama
    saved = model.config._attn_implementation
    model.config._attn_implementation = ATTENTION_NAME
    try:
        assert llama_pass.applies(model)
        handle = model.model.layers[0].register_forward_hook(lambda *a: None)
        assert not llama_pass.applies(model)  # that hook would be skipped
        handle.remove()
        handle = model.model.layers[0].mlp.register_forward_hook(lambda *a: None)
        assert llama_pass.applies(model)  # a called submodule: its hook still runs
        handle.remove()
        model.train()
        assert not llama_pass.applies(model)
        model.eval()
        assert llama_pass.applies(model)
    finally:
        model.config._attn_implementation = saved
    assert not llama_pass.applies(model)  # another attention selected
    gemma, _ = _load(build_tiny_model(tmp_path, arch="gemma3", seed=0))
    gemma.config._attn_implementation = ATTENTION_NAME
    assert not llama_pass.applies(gemma)


@pytest.mark.parametrize("choice, expected", [("mkl", "MKL packed"), ("onednn", "oneDNN packed"), ("none", "W @ x.T")])
def test_layer_form_names_what_the_engine_will_use(llama, choice, expected, monkeypatch):
    """The manifest records the linear layers' form (it can move near-ties): the same choice
    engine_linears makes."""
    from evalkit.backends import linear_order

    monkeypatch.setenv("EVALKIT_PACK", choice)
    if choice != "none" and linear_order.packing_form() != choice:
        pytest.skip(f"this torch has no {choice} packed linear operators")
    model = llama[0]
    assert linear_order.layer_form(model, available_bytes=1 << 40) == expected
    lin = next(m for m in model.modules() if type(m) is torch.nn.Linear)
    with linear_order.engine_linears(model, pack=expected != "W @ x.T"):
        form = lin.forward.keywords.get("form")
    assert {"mkl": "MKL packed", "onednn": "oneDNN packed", None: "W @ x.T"}[form] == expected
    bf = AutoModelForCausalLM.from_config(model.config).eval().to(torch.bfloat16)
    assert linear_order.layer_form(bf, available_bytes=1 << 40) == "W @ x.T"
