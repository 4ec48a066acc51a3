"""The latency protocol's pieces, without a model: statistics, timing loop, reference, memory window, grid."""
import time

import numpy as np
import pytest
from scipy import stats

from shrinkwrap.bench.grid import REAL, Point, grid, parse_length, real_batches, synthetic_batch
from shrinkwrap.bench.latency import PERCENTILES, summarize, throughput_per_s, time_calls
from shrinkwrap.bench.memory import PeakWindow
from shrinkwrap.bench.reference import Reference, normalise
from shrinkwrap.serve.errors import UserError


def test_percentiles_and_mean_interval_equal_scipy():
    # An implementation the code does not call: scipy.stats.scoreatpercentile (linear "fraction"
    # interpolation) and scipy.stats.t.interval for the mean's 95 % interval.
    from scipy import stats

    samples = np.random.default_rng(0).lognormal(0.0, 0.5, size=257)
    out = summarize(samples)
    for q in PERCENTILES:
        assert out[f"p{q}"] == pytest.approx(stats.scoreatpercentile(samples, q, interpolation_method="fraction"))
    low, high = stats.t.interval(0.95, len(samples) - 1, loc=samples.mean(), scale=stats.sem(samples))
    assert out["mean_ci95"] == pytest.approx([low, high], rel=1e-6)
    assert out["p50"] <= out["p90"] <= out["p95"] <= out["p99"] <= out["max"]
    assert out["n"] == 257 and out["min"] == samples.min()


def test_percentiles_hand_worked():
    # Hyndman & Fan (1996) definition 7 (linear interpolation between order statistics), worked by hand on
    # 1..5 ms: position q/100 * (n-1) -> p50 at 2.0 -> 3; p90 at 3.6 -> 4 + 0.6 = 4.6; p95 at 3.8 -> 4.8;
    # p99 at 3.96 -> 4.96.
    out = summarize(np.array([5.0, 1.0, 4.0, 2.0, 3.0]))
    assert [out["p50"], out["p90"], out["p95"], out["p99"]] == pytest.approx([3.0, 4.6, 4.8, 4.96])
    assert out["min"] == 1.0 and out["max"] == 5.0


def test_mean_interval_agrees_with_scipy():
    samples = np.random.default_rng(1).normal(10.0, 2.0, size=40)
    out = summarize(samples)
    # source: scipy — the Student-t interval of a mean
    lo, hi = stats.t.interval(0.95, len(samples) - 1, loc=samples.mean(), scale=stats.sem(samples))
    assert out["mean"] == pytest.approx(samples.mean())
    assert out["mean_ci95"] == pytest.approx([lo, hi])


def test_single_sample_has_no_interval():
    out = summarize(np.array([3.0]))
    assert out["p50"] == 3.0 and np.isnan(out["mean_ci95"]).all()


def test_time_calls_counts_and_minimum_time():
    calls = []
    samples = time_calls(lambda: calls.append(time.perf_counter()), warmup=3, repeats=7, min_time_s=0.0)
    assert len(samples) == 7 and len(calls) == 10 and (samples >= 0).all()

    calls.clear()
    started = time.perf_counter()
    samples = time_calls(lambda: (calls.append(1), time.sleep(0.01)), warmup=0, repeats=3, min_time_s=0.15)
    assert time.perf_counter() - started >= 0.15
    assert len(samples) > 3 and samples.min() >= 10.0  # each call sleeps 10 ms


def test_warmup_lasts_count_and_time():
    stamps = []
    time_calls(lambda: (stamps.append(time.perf_counter()), time.sleep(0.002)), warmup=2, repeats=3, min_time_s=0.0,
               warmup_s=0.1)
    warm = stamps[:-3]
    assert len(warm) > 2                         # the time, not the count, ended the warm-up
    assert warm[-1] - warm[0] >= 0.1 * 0.9       # (first call's own time aside)


def test_throughput_is_batch_over_mean():
    assert throughput_per_s(8, 4.0) == pytest.approx(2000.0)


def test_pauses_run_between_timed_calls_and_are_followed_by_an_untimed_call():
    log = []
    samples = time_calls(lambda: (log.append("call"), time.sleep(0.004)), warmup=1, repeats=10, min_time_s=0.0,
                         pause=lambda: log.append("pause"), pause_every_s=0.015)
    assert log[:3] == ["call", "pause", "call"]       # warm-up, pause, re-warm, then timing
    assert log[-1] == "pause" and log.count("pause") >= 3
    pauses = [i for i, x in enumerate(log) if x == "pause"]
    assert all(log[i + 1] == "call" for i in pauses[:-1])
    assert len(samples) == log.count("call") - 1 - len(pauses[:-1])   # untimed: warm-up and one per pause


def test_reference_product_is_a_matrix_product_and_is_timed():
    ref = Reference(threads=1)
    c = ref.session.run(None, ref.feeds)[0]
    np.testing.assert_allclose(c, ref.feeds["a"] @ ref.feeds["b"], rtol=1e-3, atol=1e-3)  # source: numpy matmul
    ms = ref.burst(repeats=4)
    assert len(ms) == 4 and min(ms) > 0 and ref.samples == ms


def test_normalised_keys():
    lat = normalise({"p50": 2.0, "p95": 3.0}, reference_ms=0.5)
    assert lat == {"p50": 2.0, "p95": 3.0, "reference_ms": 0.5, "p50_over_reference": 4.0, "p95_over_reference": 6.0}


def test_peak_window_sees_a_transient_allocation():
    window = PeakWindow()
    block = np.ones(150_000_000 // 8)   # 150 MB, touched
    del block
    peak = window.stop()
    assert peak["peak_rss_bytes"] >= peak["rss_before_load_bytes"] > 0
    assert peak["peak_over_start_bytes"] >= 140e6
    if "VmHWM" in peak["method"]:   # the reset window: a later window without the block does not see it
        assert PeakWindow().stop()["peak_over_start_bytes"] < 100e6


def test_grid_is_every_pair_once_in_order():
    points = grid([1, 8, 1], [32, 128, REAL])
    assert points == [Point(1, 32), Point(1, 128), Point(1, REAL), Point(8, 32), Point(8, 128), Point(8, REAL)]


def test_parse_length():
    assert parse_length("64") == 64 and parse_length(REAL) == REAL
    import argparse

    for bad in ("0", "-3", "long", "1.5"):
        with pytest.raises(argparse.ArgumentTypeError):
            parse_length(bad)


def test_real_batches_are_full_and_padded_to_their_own_longest():
    examples = [{"input_ids": [101] + [7] * n + [102], "attention_mask": [1] * (n + 2)} for n in (1, 5, 2, 9, 3)]
    batches = real_batches(examples, pad_id=0, batch_size=2)
    assert len(batches) == 3 and all(b["input_ids"].shape[0] == 2 for b in batches)
    assert [b["input_ids"].shape[1] for b in batches] == [7, 11, 5]   # last batch wraps round to the first text
    assert batches[0]["attention_mask"][0].tolist() == [1, 1, 1, 0, 0, 0, 0]


def test_synthetic_batch_stays_in_vocabulary():
    b = synthetic_batch(["input_ids", "attention_mask", "token_type_ids"], 100, 4, 16, "m.onnx")
    assert b["input_ids"].shape == (4, 16) and b["input_ids"].max() < 100 and b["input_ids"].min() >= 0
    assert b["attention_mask"].all() and not b["token_type_ids"].any()
    with pytest.raises(UserError, match="pixel_values"):
        synthetic_batch(["pixel_values"], 100, 1, 8, "m.onnx")
