"""How the engine computes linear layers: on packed weights (MKL's or oneDNN's), else ``W @ x.T``.

Float32 (the default path): each plain ``nn.Linear`` runs on a copy of its weight that a CPU
kernel library bundled with torch has laid out ("packed") in its own blocked format once
(:func:`packed_weight`; kept while the module lives and its weight is unchanged). Which library
(:func:`packing_form`): on Intel CPUs MKL's packed matrix product (``cblas_sgemm_pack`` /
``cblas_sgemm_compute``, reached through ``torch.ops.mkl``), elsewhere oneDNN's. Measured on the
2-core Intel Xeon (AVX-512, 2026-12-04), SmolLM2-135M's 211 products with weights read from
memory, oneDNN against MKL packed: 2 rows 29.5 vs 23.2 ms, 8 rows 32.8 vs 31.0, 32 rows 51.1 vs
46.2, 64 rows 75.2 vs 63.7, 128 rows 114.1 vs 97.7, 512 rows 375.4 vs 345.3 (best of 5); whole
engine runs of 64 questions, 4 alternated each: worked 13.41 vs 12.42 s, direct 5.10 vs 4.78 s,
decode steps at 128 rows 209.7 vs 188.3 ms (median of 30), the same completions. On AMD CPUs MKL
packed is not measured, so they keep oneDNN, measured there as below. ``EVALKIT_PACK=onednn``,
``mkl`` or ``none`` chooses by hand (A/B runs).

MKL's packed copy is made once for 512 rows (torch's ``_mkl_reorder_linear_weight``) and used
at whatever row count a product has, which torch's wrapper would otherwise refuse (it falls back
to an unpacked product when the rows differ from the packing hint). MKL lays out the packed
weight for the weight alone; before a model's first use the engine checks that, computing each
weight shape's packed product at several row counts against ``x @ W.T``
(:func:`mkl_packing_agrees`), and uses oneDNN for that model if any result disagrees.

oneDNN: measured on the AVX-512 AMD machine on SmolLM2-135M against the ``W @ x.T`` form below, variants
alternated in one process, 4 runs each, same completions: worked run of 32 questions 30.2 vs
33.1 s median (faster in every pair) and, in a second A/B, 28.4 vs 31.9 s; direct run of 64
questions 16.4 vs 16.8 s and 17.4 vs 17.4 s (no clear difference); decode at 128 rows 201-217 vs
171-195 tokens/s, at 1 and 32 rows the same. Its cost is smooth in the row count (31 rows
cost what 32 do), so its rows are not padded. The packed copies take as much memory as the
weights, so the engine packs only where they fit well in the memory available
(:func:`should_pack`); otherwise, and for other dtypes, the form below is used.

Unpacked: ``nn.Linear`` computes ``x @ W.T``. For a product with few rows (a decode step
feeds one token per row: 1 to a few hundred rows) Intel MKL on a 2-core AVX2 CPU ran the same
product written as ``(W @ x.T).T`` 1.2-1.8x faster (measured here: SmolLM2-135M's layer
weights at 32 rows, 100 vs 135 ms per step; its 49,152-row output projection 33 vs 59 ms),
because the long weight dimension then drives MKL's kernel. Above a few hundred rows
(prefill) the plain form is as fast or faster, so it is kept there. Row counts are padded with
zero rows to ones MKL's kernels block by (:func:`padded_rows`): an awkward count such as 31
cost as much as 48.

One row (a batch-1 decode step, or the last row of a batch) is neither: MKL's matrix-vector
kernel and oneDNN's one-row product both read the weight with one core's bandwidth (measured
here, SmolLM2-135M's 211 weights: 6-8 GB/s against 15-20 GB/s for summing a tensor as large).
:func:`one_row` splits the weight's output rows into one equal slice per torch thread and
computes the slices as one batched product (``torch.bmm`` on views: nothing copied), which MKL
spreads over the threads: 50.6-53.8 vs 66.7 ms for all 211 products (oneDNN packed), a
batch-1 decode step of SmolLM2-135M 112-119 vs 143-152 ms (4 runs each, alternated, same
completions). It serves bfloat16 weights too: the same 210 layer weights in bfloat16 at one row,
30.3-30.6 vs 43.8-54.9 ms against the two-row ``W @ x.T`` form (3 alternations).

Every form computes the same sums, possibly in another order: results differ in the last
float32 bits, like any change of batch shape. The engine's equality tests against plain
one-at-a-time ``generate`` cover these paths (tests/test_engine.py, tests/test_engine_real.py).

:func:`engine_linears` swaps the forward of a model's plain ``nn.Linear`` modules for the
duration of a ``with`` block and restores them afterwards, so the model object stays as
the caller loaded it.
"""

from __future__ import annotations

import contextlib
import functools
import os
import weakref

import torch
from torch import nn

__all__ = ["engine_linears", "layer_form", "MAX_TRANSPOSED_ROWS", "mkl_packing_agrees", "one_row", "packable_linears",
           "packed_weight", "packing_available", "packing_form", "padded_rows", "should_pack"]

MAX_TRANSPOSED_ROWS = 256  # measured crossover: at 512 rows and more nn.Linear's own form was faster
CONTIGUOUS_BLOCK = 2048    # output rows per block when a product must come out laid out in rows (logits):
                           # SmolLM2's 49,152-row output projection at 64 rows 51 vs 78 ms, at 128 rows
                           # 79 vs 132 ms (measured here; 1024 and 4096 alike)
MIN_BLOCKED_ROWS = 9       # fewer rows: one whole transpose is cheap (at 2 rows 10.9 ms against 11.6 in blocks;
                           # at 8 rows blocks saved 2 ms of 20, within noise)
PACK_HINT_ROWS = 512       # rows the packed weight is laid out for; measured on SmolLM2's layer weights (oneDNN),
                           # as fast as packing for the actual row count at 2-128 rows, faster at 448
MKL_CHECK_ROWS = (2, 3, 17, 64, 129)  # row counts at which MKL's packed products are checked before first use
FORMS = ("mkl", "onednn")
PACK_MEMORY_FRACTION = 0.25  # pack only when the packed copies take at most this share of available memory

# module -> ((weakref to its weight, storage address, version, form), packed copy)
_packed: "weakref.WeakKeyDictionary[nn.Linear, tuple[tuple, torch.Tensor]]" = weakref.WeakKeyDictionary()
# model -> whether MKL's packed products agreed with x @ W.T on its weights
_mkl_checked: "weakref.WeakKeyDictionary[nn.Module, bool]" = weakref.WeakKeyDictionary()


def _can_pack(m: nn.Module) -> bool:
    return type(m) is nn.Linear and m.weight.dtype == torch.float32 and m.weight.device.type == "cpu"


def packable_linears(model: nn.Module) -> list[nn.Linear]:
    """The layers of ``model`` that get packed weights: plain float32 ``nn.Linear`` on the CPU."""
    return [m for m in model.modules() if _can_pack(m)]


def _form_available(form: str) -> bool:
    if form == "onednn":
        ops = getattr(torch.ops, "mkldnn", None)
        return bool(torch.backends.mkldnn.is_available() and ops is not None
                    and hasattr(ops, "_reorder_linear_weight") and hasattr(ops, "_linear_pointwise"))
    if form == "mkl":
        ops = getattr(torch.ops, "mkl", None)
        return bool(torch.backends.mkl.is_available() and ops is not None
                    and hasattr(ops, "_mkl_reorder_linear_weight") and hasattr(ops, "_mkl_linear"))
    return False


@functools.lru_cache(maxsize=1)
def _cpu_vendor() -> str:
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("vendor_id"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return ""


def packing_form() -> str | None:
    """Which packed products this machine's engine uses: ``"mkl"`` on Intel CPUs where torch has
    MKL's packed operators, else ``"onednn"`` where it has oneDNN's, else None (no packing).
    ``EVALKIT_PACK`` (``mkl``, ``onednn`` or ``none``) overrides; an unavailable choice is None."""
    choice = os.environ.get("EVALKIT_PACK", "").strip().lower()
    if choice:
        return choice if choice in FORMS and _form_available(choice) else None
    if _cpu_vendor() == "GenuineIntel" and _form_available("mkl"):
        return "mkl"
    return "onednn" if _form_available("onednn") else None


def packing_available() -> bool:
    """Whether this torch can pack float32 linear weights here (:func:`packing_form`)."""
    return packing_form() is not None


def _pack(w: torch.Tensor, form: str) -> torch.Tensor:
    with torch.no_grad():
        if form == "mkl":
            return torch.ops.mkl._mkl_reorder_linear_weight(w.detach().contiguous(), PACK_HINT_ROWS)
        return torch.ops.mkldnn._reorder_linear_weight(w.detach(), PACK_HINT_ROWS)


def packed_weight(m: nn.Linear, form: str | None = None) -> torch.Tensor:
    """The packed copy of ``m.weight`` in ``form`` (default :func:`packing_form`), made once and
    reused while the weight is unchanged.

    Keyed by the module (weakly: the copy goes with the model) and checked against the weight
    tensor itself, its storage, its version counter and the form, so a weight replaced (even by
    one that lands at the same address), given new data or changed in place is packed again.
    """
    form = form or packing_form() or "onednn"
    w = m.weight
    hit = _packed.get(m)
    if hit is not None:
        (ref, ptr, version, made_as), packed = hit
        if ref() is w and ptr == w.data_ptr() and version == w._version and made_as == form:
            return packed
    packed = _pack(w, form)
    _packed[m] = ((weakref.ref(w), w.data_ptr(), w._version, form), packed)
    return packed


def _mkl_product(self: nn.Linear, x2: torch.Tensor, packed: torch.Tensor) -> torch.Tensor:
    """``x2 @ W.T`` (+ bias) on MKL's packed weight, for a contiguous [rows, in] ``x2``."""
    return torch.ops.mkl._mkl_linear(x2, packed, self.weight, self.bias, x2.shape[0])


def mkl_packing_agrees(model: nn.Module) -> bool:
    """Whether MKL's packed products on ``model``'s weights equal ``x @ W.T`` to float32 rounding.

    One layer of each weight shape, at each of :data:`MKL_CHECK_ROWS`, on seeded random inputs;
    remembered per model. Measured here (SmolLM2-135M, all 211 weights, 1-256 rows): largest
    error 1.1e-6 of the largest output, against 0.9e-6 for ``x @ W.T`` itself, both against
    float64; a layout that depended on the row count would be off by the outputs' own size.
    """
    known = _mkl_checked.get(model)
    if known is not None:
        return known
    g = torch.Generator().manual_seed(0)
    seen, ok = set(), True
    with torch.inference_mode():
        for m in packable_linears(model):
            if tuple(m.weight.shape) in seen:
                continue
            seen.add(tuple(m.weight.shape))
            packed = packed_weight(m, "mkl")
            for rows in MKL_CHECK_ROWS:
                x = torch.randn(rows, m.in_features, generator=g)
                ref = nn.functional.linear(x, m.weight, m.bias)
                scale = float(ref.abs().max()) or 1.0
                if not bool(((_mkl_product(m, x, packed) - ref).abs() <= 1e-4 * scale).all()):
                    ok = False
                    break
            if not ok:
                break
    _mkl_checked[model] = ok
    return ok


def layer_form(model: nn.Module, available_bytes: int) -> str:
    """What the engine's float32 linear layers of ``model`` run on, in words, as
    :func:`engine_linears` would choose with :func:`should_pack`: ``"MKL packed"``,
    ``"oneDNN packed"`` or ``"W @ x.T"`` (recorded in the manifest: the form can move near-ties)."""
    if not should_pack(model, available_bytes):
        return "W @ x.T"
    form = packing_form()
    if form == "mkl" and not mkl_packing_agrees(model):
        form = "onednn" if _form_available("onednn") else None
    return {"mkl": "MKL packed", "onednn": "oneDNN packed", None: "W @ x.T"}[form]


def should_pack(model: nn.Module, available_bytes: int) -> bool:
    """Whether the engine should use packed float32 weights for ``model``.

    Yes when packed products are available (:func:`packing_form`), the model has float32 plain linear
    layers, and the copies not packed yet take at most :data:`PACK_MEMORY_FRACTION` of ``available_bytes``.
    """
    if not packing_available():
        return False
    linears = packable_linears(model)
    if not linears:
        return False
    todo = sum(m.weight.nbytes for m in linears if m not in _packed)
    return todo <= PACK_MEMORY_FRACTION * available_bytes


def padded_rows(rows: int) -> int:
    """Rows to compute for a product of ``rows`` rows: 2 for 1, 4 for 3, else a multiple of 8.

    MKL's products here cost much more at row counts its kernels do not block by: measured
    on SmolLM2-135M's 1536x576 weights, 9 rows took 0.89 ms against 0.48 ms for 8, 31 rows
    1.38 against 0.80 ms for 32, 63 rows 2.2 against 1.5 ms for 64; one row (the
    matrix-vector kernel) 0.73 against 0.37 ms for two. Padding rows are zeros, computed and
    dropped.
    """
    if rows <= 2:
        return 2
    if rows <= 4:
        return 4
    return -(-rows // 8) * 8


def one_row(weight: torch.Tensor, bias: torch.Tensor | None, x: torch.Tensor) -> torch.Tensor | None:
    """``x @ weight.T`` (+ bias) for one row ``x`` [k], as one slice of output rows per thread.

    Returns [out], or None where the split does not apply (one thread, a weight that is not
    contiguous, or output rows that do not divide evenly): the caller then uses its own form.
    """
    parts = torch.get_num_threads()
    out, k = weight.shape
    if parts < 2 or out % parts or not weight.is_contiguous():
        return None
    y = torch.bmm(x.reshape(1, 1, k).expand(parts, 1, k),
                  weight.view(parts, out // parts, k).transpose(1, 2))  # [parts, 1, out/parts]
    y = y.view(out)
    return y if bias is None else y + bias


def _one_row_or_none(self: nn.Linear, x: torch.Tensor) -> torch.Tensor | None:
    """:func:`one_row` where ``x`` holds exactly one row of the weight's dtype, else None."""
    k = x.shape[-1]
    if x.numel() != k or x.dtype != self.weight.dtype:
        return None
    y = one_row(self.weight, self.bias, x.reshape(k))
    return None if y is None else y.view(*x.shape[:-1], y.shape[0])


def _product(weight: torch.Tensor, bias: torch.Tensor | None, xt: torch.Tensor) -> torch.Tensor:
    """``weight @ xt`` (+ bias per output), [out, rows]."""
    if bias is not None:
        return torch.addmm(bias[:, None], weight, xt)
    return torch.mm(weight, xt)


def _packed_forward(self: nn.Linear, x: torch.Tensor, packed: torch.Tensor, form: str = "onednn") -> torch.Tensor:
    if x.dtype != torch.float32 or x.numel() == 0:
        return nn.functional.linear(x, self.weight, self.bias)
    y = _one_row_or_none(self, x)
    if y is not None:
        return y
    k = x.shape[-1]
    x2 = x.reshape(-1, k).contiguous()
    if form == "mkl":
        y = _mkl_product(self, x2, packed)
    else:
        y = torch.ops.mkldnn._linear_pointwise(x2, packed, self.bias, "none", [], "")
    return y.reshape(*x.shape[:-1], y.shape[-1])  # laid out in rows, as logits want


def _forward(self: nn.Linear, x: torch.Tensor, contiguous: bool = False) -> torch.Tensor:
    k = x.shape[-1]
    rows = x.numel() // k if k else 0
    if rows == 0 or rows > MAX_TRANSPOSED_ROWS or x.dtype != self.weight.dtype:
        return nn.functional.linear(x, self.weight, self.bias)
    y = _one_row_or_none(self, x)
    if y is not None:
        return y
    flat = x.reshape(rows, k)
    pad = padded_rows(rows) - rows
    if pad:
        flat = nn.functional.pad(flat, (0, 0, 0, pad))
    xt = flat.t()
    n_out = self.weight.shape[0]
    if contiguous and rows >= MIN_BLOCKED_ROWS and n_out > CONTIGUOUS_BLOCK:
        # Laid out in rows block by block: each block's transpose is copied while it is still
        # in cache (one transpose of the whole [out, rows] product copied it from memory).
        # Each output is the same dot product either way: the result is bit for bit the same.
        y = x.new_empty(rows, n_out)
        for a in range(0, n_out, CONTIGUOUS_BLOCK):
            b = min(n_out, a + CONTIGUOUS_BLOCK)
            bias = None if self.bias is None else self.bias[a:b]
            y[:, a:b] = _product(self.weight[a:b], bias, xt)[:, :rows].t()
    else:
        y = _product(self.weight, self.bias, xt)[:, :rows].t()  # [rows, out], strides (1, ...)
        if contiguous:
            y = y.contiguous()
    return y.reshape(*x.shape[:-1], n_out)


@contextlib.contextmanager
def engine_linears(model: nn.Module, pack: bool = False):
    """Within the block, the model's plain ``nn.Linear`` layers use the engine's forms.

    With ``pack``, float32 layers run on packed weights (:func:`packed_weight`), in the form
    :func:`packing_form` names (MKL's only after :func:`mkl_packing_agrees` on this model, else
    oneDNN's); the others, and all of them without ``pack``, use the ``W @ x.T`` form. Yields the
    number of layers swapped.
    """
    swapped = []
    head = model.get_output_embeddings() if hasattr(model, "get_output_embeddings") else None
    form = packing_form() if pack else None
    if form == "mkl" and not mkl_packing_agrees(model):
        form = "onednn" if _form_available("onednn") else None
    pack = form is not None
    for m in model.modules():
        # Only plain float linear layers: subclasses (quantized, LoRA, ...) keep their own forward.
        if type(m) is nn.Linear and "forward" not in vars(m) and m.weight.dim() == 2 \
                and m.weight.is_floating_point():
            if pack and _can_pack(m):
                m.forward = functools.partial(_packed_forward, m, packed=packed_weight(m, form), form=form)
            else:
                # Logits are scanned along the vocabulary, which wants them contiguous; other
                # outputs feed element-wise ops and views, which take the transposed layout as is.
                m.forward = functools.partial(_forward, m, contiguous=m is head)
            swapped.append(m)
    try:
        yield len(swapped)
    finally:
        for m in swapped:
            del m.forward
