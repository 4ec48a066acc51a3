"""The benchmark grid: which batches are timed at each (batch size, sequence length) point.

A fixed length L times real texts padded or cut to exactly L tokens (or, without data, synthetic
token ids: every position a real token, the worst case). `real` times batches of consecutive real
texts, each padded only to its own longest text, cycling through the data: the latency a server
with dynamic padding sees on this traffic.
"""
from __future__ import annotations

import itertools
import sys
from dataclasses import dataclass
from typing import Optional, Union

import numpy as np

from shrinkwrap.serve.batches import collate
from shrinkwrap.serve.errors import UserError

REAL = "real"
SYNTHETIC_SEED = 0
# Enough distinct batches to show the spread of real lengths; more only costs memory.
MAX_REAL_BATCHES = 256


@dataclass(frozen=True)
class Point:
    batch_size: int
    sequence_length: Union[int, str]    # tokens, or REAL


def parse_length(text: str) -> Union[int, str]:
    """argparse type of --sequence-length: a positive integer or `real`."""
    if text == REAL:
        return REAL
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        import argparse

        raise argparse.ArgumentTypeError(f"{text!r} — a number of tokens (1 or more) or `{REAL}`")
    return value


def grid(batch_sizes: list[int], lengths: list[Union[int, str]]) -> list[Point]:
    """Every (batch size, length) pair, in the order given, without repeats."""
    return [Point(b, n) for b, n in dict.fromkeys(itertools.product(batch_sizes, lengths))]


def fixed_batch(examples: list[dict], pad_id: int, batch_size: int, length: int) -> dict[str, np.ndarray]:
    """`batch_size` real texts padded or cut to exactly `length` tokens (reused cyclically if too few)."""
    rows = [examples[i % len(examples)] for i in range(batch_size)]
    return collate(rows, pad_id, length=length)


def real_batches(examples: list[dict], pad_id: int, batch_size: int) -> list[dict[str, np.ndarray]]:
    """Consecutive texts in data order, each batch padded to its own longest; the last wraps round
    to the start so that every batch is full and throughput stays batch_size per call."""
    count = min(MAX_REAL_BATCHES, max(1, -(-len(examples) // batch_size)))
    return [collate([examples[(k * batch_size + i) % len(examples)] for i in range(batch_size)], pad_id)
            for k in range(count)]


def synthetic_batch(input_names: list[str], vocab_size: int, batch_size: int, length: int,
                    where: str) -> dict[str, np.ndarray]:
    """Random token ids below `vocab_size`, full attention, one segment: enough to time any encoder."""
    rng = np.random.default_rng(SYNTHETIC_SEED)
    shape = (batch_size, length)
    out = {}
    for name in input_names:
        if "input_ids" in name:
            out[name] = rng.integers(0, vocab_size, size=shape, dtype=np.int64)
        elif "attention_mask" in name:
            out[name] = np.ones(shape, dtype=np.int64)
        elif "token_type_ids" in name:
            out[name] = np.zeros(shape, dtype=np.int64)
        elif "position_ids" in name:
            out[name] = np.broadcast_to(np.arange(length, dtype=np.int64), shape).copy()
        else:
            raise UserError(f"{where}: input {name!r} — synthetic inputs exist for input_ids, attention_mask, "
                            f"token_type_ids and position_ids; give --data to time real texts")
    return out


def point_batches(point: Point, target, examples: Optional[list[dict]], pad_id: int) -> list[dict]:
    """The batches timed at `point` (one for a fixed length; many for `real`)."""
    where = str(target.path)
    if point.sequence_length == REAL:
        if examples is None:
            raise UserError(f"--sequence-length {REAL} needs --data: real lengths come from real texts")
        return real_batches(examples, pad_id, point.batch_size)
    limit = target.token_limit()
    if limit is not None and point.sequence_length > limit:
        raise UserError(f"sequence length {point.sequence_length} — {where} takes at most {limit} tokens")
    if examples is not None:
        return [fixed_batch(examples, pad_id, point.batch_size, point.sequence_length)]
    vocab = target.vocab_size()
    if vocab is None:
        from shrinkwrap.bench.targets import SAFE_VOCAB

        if not target.extra.get("vocab_noted"):
            print(f"note: {where}: cannot tell its vocabulary size from the graph or a config.json beside it — "
                  f"timing with token ids below {SAFE_VOCAB}, which every BERT-family vocabulary has",
                  file=sys.stderr, flush=True)
            target.extra["vocab_noted"] = True
        vocab = SAFE_VOCAB
    return [synthetic_batch(target.input_names, vocab, point.batch_size, point.sequence_length, where)]


def format_table(rows: list[dict]) -> str:
    """Markdown table of the grid rows."""
    head = ("| batch | tokens | p50 ms | p90 ms | p95 ms | p99 ms | mean ms (95 % CI) | runs | sequences/s | "
            "p95 / reference |\n|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    lines = [head]
    for r in rows:
        tokens = r["sequence_length"]
        if tokens == REAL:
            tokens = f"real (mean {r['mean_tokens']:.0f})"
        lo, hi = r["mean_ci95"]
        lines.append(f"| {r['batch_size']} | {tokens} | {r['p50']:.3f} | {r['p90']:.3f} | {r['p95']:.3f} | "
                     f"{r['p99']:.3f} | {r['mean']:.3f} ({lo:.3f}–{hi:.3f}) | {r['n']} | "
                     f"{r['throughput_per_s']:.1f} | {r['p95_over_reference']:.2f}× |")
    return "\n".join(lines)


def bench_text(result: dict) -> str:
    """What `shrinkwrap bench` prints: the target, memory, accuracy, the grid table, the machine."""
    mb = 1e6
    mem = result["memory"]
    ref = result["reference"]
    lines = [f"target:    {result['path']} ({result['format']}, {result['size_bytes'] / mb:.2f} MB, "
             f"loaded in {result['load_seconds']:.3f} s)",
             f"memory:    peak RSS {mem['peak_rss_bytes'] / mb:.1f} MB, {mem['peak_over_start_bytes'] / mb:.1f} MB "
             f"above the {mem['rss_before_load_bytes'] / mb:.1f} MB before loading ({mem['method']})",
             f"reference: {ref['ms']:.3f} ms median over the run ({ref['workload']})"]
    if "metrics" in result and "accuracy" in result["metrics"]:
        m, d = result["metrics"], result["data"]
        lines.append(f"accuracy:  {m['accuracy']:.4f}, macro-F1 {m['macro_f1']:.4f} on {d['rows']} texts of "
                     f"{d['path']} (cut at {d['max_length']} tokens)")
    elif "metrics" in result:  # a sentence encoder: against --reference's vectors, and the kNN vote with labels
        m, d = result["metrics"], result["data"]
        figures = [f"{label} {m[key]:.4f}" for key, label in (
            ("cosine_to_teacher", "cosine to the reference"), ("neighbour_recall_at_10", "neighbour recall at 10"),
            ("cross_recall_at_10", "cross recall at 10"), ("knn_accuracy", "kNN accuracy")) if key in m]
        lines.append(f"vectors:   {', '.join(figures) or 'no figure (give --reference or a label column)'} on "
                     f"{d['rows']} texts of {d['path']} (cut at {d['max_length']} tokens)")
    p = result["protocol"]
    machine = result["machine"]
    versions = ", ".join(f"{k} {v}" for k, v in machine["versions"].items())
    lines += ["", format_table(result["latency"]), "",
              f"{p['threads']} threads; warm-up {p['warmup']} runs and {p['warm_seconds']:g} s; then at least "
              f"{p['repeats']} runs and {p['timed_seconds']:g} s per row.",
              f"machine: {machine['cpu']}, {machine['cores_available']} of {machine['cores_total']} cores; {versions}"]
    return "\n".join(lines)
