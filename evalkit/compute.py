"""Compute accounting: what each condition cost, and what accuracy costs.

Inference FLOPs are estimated with the forward-pass rule of Kaplan et al. (2020), "Scaling Laws
for Neural Language Models": about ``2 × N`` FLOPs per token processed, where ``N`` is the number
of non-embedding parameters. Tokens processed are the prompt tokens plus the generated tokens of
every record, as if each prompt were computed from scratch: the nominal cost of the condition,
independent of how cleverly a runner shares prefixes (shared-prefix reuse lowers the real cost,
which the wall seconds show).
"""

from __future__ import annotations

import threading
import time

import pandas as pd


def _rss_bytes() -> int:
    try:
        with open("/proc/self/statm") as f:
            import os

            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):  # not Linux: fall back to the process peak so far
        import resource

        return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


class PeakMemory:
    """Largest resident memory of this process while the block runs, sampled every `interval` seconds."""

    def __init__(self, interval: float = 0.1):
        self.interval, self.peak, self.seconds = interval, 0, 0.0
        self._stop = threading.Event()

    def _watch(self) -> None:
        while not self._stop.is_set():
            self.peak = max(self.peak, _rss_bytes())
            self._stop.wait(self.interval)

    def __enter__(self) -> "PeakMemory":
        self.peak, self._start = _rss_bytes(), time.perf_counter()
        self._thread = threading.Thread(target=self._watch, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, _rss_bytes())
        self.seconds = time.perf_counter() - self._start

__all__ = ["PeakMemory", "merge_costs", "FLOPS_FORMULA", "forward_flops", "non_embedding_parameters", "cost_table", "cheapest_within_best"]

FLOPS_FORMULA = "FLOPs ≈ 2 × N_non-embedding × (prompt tokens + generated tokens)  (Kaplan et al., 2020)"


def forward_flops(non_embedding_parameters: int, tokens: int) -> float:
    """Approximate forward-pass FLOPs for `tokens` tokens through a model of N non-embedding parameters."""
    return 2.0 * float(non_embedding_parameters) * float(tokens)


def non_embedding_parameters(model) -> int:
    """Parameters outside the token embedding and an untied output projection."""
    total = sum(p.numel() for p in model.parameters())
    seen = set()
    excluded = 0
    for module in (model.get_input_embeddings(), model.get_output_embeddings()):
        if module is None:
            continue
        for p in module.parameters():
            if id(p) not in seen:  # tied embeddings are one tensor, counted once
                seen.add(id(p))
                excluded += p.numel()
    return int(total - excluded)


def cost_table(summary: pd.DataFrame, models: dict[str, dict]) -> pd.DataFrame:
    """The summary with parameter counts and a FLOPs estimate per condition."""
    df = summary.copy()
    params = {m: (info or {}).get("parameters") for m, info in models.items()}
    non_emb = {m: (info or {}).get("non_embedding_parameters") for m, info in models.items()}
    df["parameters"] = df["model"].map(params)
    df["non_embedding_parameters"] = df["model"].map(non_emb)
    tokens = df["prompt_tokens"] + df["new_tokens"]
    df["flops"] = [
        forward_flops(n, t) if pd.notna(n) and n else float("nan")
        for n, t in zip(df["non_embedding_parameters"], tokens)
    ]
    df["flops_per_item"] = df["flops"] / df["n"]
    return df


def merge_costs(summary: pd.DataFrame, costs: pd.DataFrame) -> pd.DataFrame:
    """The summary with each condition's measured wall seconds and memory peak."""
    if costs.empty:
        return summary.assign(wall_seconds=float("nan"), peak_rss_bytes=float("nan"))
    return summary.merge(costs, on="condition_id", how="left")


def cheapest_within_best(costs: pd.DataFrame) -> pd.Series | None:
    """The cheapest condition (by FLOPs) whose accuracy lies within the interval of the best one.

    Within means: its accuracy is at least the lower end of the best condition's 95% interval.
    That is a screening rule (common practice), not a test of equivalence.
    """
    if costs.empty or costs["flops"].isna().all():
        return None
    best = costs.loc[costs["accuracy"].idxmax()]
    near = costs[(costs["accuracy"] >= best["ci_low"]) & costs["flops"].notna()]
    if near.empty:
        return best
    return near.loc[near["flops"].idxmin()]
