"""`shrinkwrap bench ARTIFACT --load [RATE ...]`: the artifact served by `shrinkwrap serve` in a child process on
a loopback port, driven by the open-loop generator (shrinkwrap.bench.load) at each rate for a fixed time, or,
without rates, at rising rates until the client's p95 passes the limit: `capacity_rps` is the highest rate whose
p95 stayed within it with every request answered 200.
"""
from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from shrinkwrap.bench.load import Body, Plan, run_rate, summarize
from shrinkwrap.serve.errors import UserError

HOST = "127.0.0.1"          # the server under test listens on this machine only
TEXTS = 256                 # distinct texts the requests cycle through
START_TIMEOUT_S = 120.0
PROBE_REQUESTS = 20         # one at a time, to guess where the search starts
REFINE_UNTIL = 0.1          # the search stops once the passing and failing rates are this close (relative)


class Server:
    """`shrinkwrap serve` in a child process on a free loopback port, stopped with SIGTERM."""

    def __init__(self, artifact: str, options: list[str]):
        cmd = [sys.executable, "-m", "shrinkwrap", "serve", artifact, "--host", HOST, "--port", "0", *options]
        self.proc = subprocess.Popen(cmd, stderr=subprocess.PIPE, stdout=subprocess.DEVNULL, text=True)
        self.log = ""
        first = self.proc.stderr.readline()
        found = re.search(rf"http://{re.escape(HOST)}:(\d+)", first)
        if not found:
            self.stop()
            rest = (first + self.log).strip()
            raise UserError(f"the server did not start — {rest.splitlines()[-1] if rest else 'no output'}")
        self.port = int(found.group(1))
        self.started = first.strip()
        deadline = time.monotonic() + START_TIMEOUT_S
        while not self.healthy():
            if self.proc.poll() is not None or time.monotonic() > deadline:
                self.stop()
                raise UserError(f"the server on port {self.port} did not answer /health within {START_TIMEOUT_S:.0f} s")
            time.sleep(0.1)

    def healthy(self) -> bool:
        try:
            with urllib.request.urlopen(f"http://{HOST}:{self.port}/health", timeout=2) as r:
                return r.status == 200
        except OSError:
            return False

    def stop(self) -> int:
        """SIGTERM, then the exit code once it has drained (killed after a minute); its later log lines are kept
        in `self.log`."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            self.log = self.proc.communicate(timeout=60)[1] or ""
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.log = self.proc.communicate()[1] or ""
        return self.proc.returncode


def request_texts(artifact: str, data: Optional[str], text_col: str, pair_col: Optional[str],
                  length: int, seed: int = 0) -> tuple[list[tuple[str, Optional[str]]], str]:
    """(texts, or pairs, the requests carry; what they are) — from --data, else drawn from the artifact's own
    vocabulary at `length` tokens."""
    from shrinkwrap.serve.artifact import verify
    from shrinkwrap.serve.predict import read_inputs

    manifest = verify(artifact)
    pairs = bool((manifest.get("tokenizer") or {}).get("text_pair"))
    if data:
        chunks = read_inputs([], data, None, pairs, text_col, pair_col or "text_pair")
        rows = [(text, pair) for chunk in chunks for text, pair, _ in chunk][:TEXTS]   # the ids play no part
        return rows, f"the first {len(rows)} texts of {data}"
    from tokenizers import Tokenizer

    tok = Tokenizer.from_file(str(Path(artifact) / "tokenizer.json"))
    tok.no_truncation()
    tok.no_padding()
    words = sorted(w for w in tok.get_vocab() if w.isalpha() and w.isascii() and len(w) > 1)
    if not words:
        raise UserError(f"{artifact}: no plain words in its vocabulary to make texts from — give --data")
    rng = np.random.default_rng(seed)

    def text(tokens: int) -> str:
        out: list[str] = []
        while len(tok.encode(" ".join(out)).ids) < tokens:
            out.append(words[int(rng.integers(len(words)))])
        return " ".join(out)

    half = max(1, length // 2 - 1)   # a pair shares the tokens between its two texts
    rows = [(text(half), text(half)) if pairs else (text(length), None) for _ in range(TEXTS // 4)]
    return rows, (f"{len(rows)} texts of {length} tokens, words drawn at random from the artifact's vocabulary"
                  if not pairs else f"{len(rows)} pairs of texts of {half} tokens each, drawn from its vocabulary")


def bodies(rows: list[tuple[str, Optional[str]]]) -> list[Body]:
    """One text per request, as the capacity figure is defined."""
    return [Body(json.dumps({"texts": [t], **({"text_pairs": [p]} if p is not None else {})}).encode())
            for t, p in rows]


def probe_rps(port: int, sample: list[Body]) -> float:
    """Requests per second one caller at a time gets: where the search starts (half of it)."""
    started = time.perf_counter()
    for body in (sample * PROBE_REQUESTS)[:PROBE_REQUESTS]:
        req = urllib.request.Request(f"http://{HOST}:{port}/predict", data=body.data,
                                     headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=30) as r:
            r.read()
    return PROBE_REQUESTS / (time.perf_counter() - started)


def passes(row: dict, max_p95_ms: float) -> bool:
    return row["errors"] == 0 and row["p95_ms"] <= max_p95_ms


def measure_load(artifact: str, server_options: list[str], rows: list, rates: list[float], seconds: float,
                 max_p95_ms: float, budget_s: float, log: Callable[[str], None]) -> dict:
    """Each rate's row (or the stepped search when no rates are given) and capacity_rps."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    sample = bodies(rows)
    server = Server(artifact, server_options)
    log(server.started)
    results: list[dict] = []
    began = time.monotonic()
    try:
        def at(rate: float, again: bool = False) -> dict:
            log(f"{rate:.1f} requests/s for {seconds:g} s" + (" (again)" if again else ""))
            row = summarize(run_rate(Plan(HOST, server.port, sample, rate, seconds, seed=len(results))), cores)
            row["passes"] = passes(row, max_p95_ms)
            results.append(row)
            log(f"  p95 {row['p95_ms']:.1f} ms, {row['errors']} errors — {'within' if row['passes'] else 'over'} "
                f"{max_p95_ms:g} ms")
            return row

        def holds(rate: float) -> bool:
            """A rate fails only when it fails twice: one stall of a shared machine must not end the search low."""
            if at(rate)["passes"]:
                return True
            return time.monotonic() - began + seconds < budget_s and at(rate, again=True)["passes"]

        if rates:
            for rate in rates:
                at(rate)
        else:
            good, bad, rate = None, None, max(1.0, round(probe_rps(server.port, sample) / 2, 1))
            while time.monotonic() - began + seconds < budget_s:
                if holds(rate):
                    good = rate
                    rate = rate * 2 if bad is None else (good + bad) / 2
                else:
                    bad = rate
                    if good is None and rate <= 1:
                        break
                    rate = rate / 2 if good is None else (good + bad) / 2
                if good is not None and bad is not None and (bad - good) / good < REFINE_UNTIL:
                    break
    finally:
        code = server.stop()
    # a rate counts when it passed (the stepped search measures a failed rate twice; one pass is enough)
    good_rates = [r["offered_rps"] for r in results if r["passes"]]
    return {"rates": results, "capacity_rps": max(good_rates) if good_rates else None, "max_p95_ms": max_p95_ms,
            "seconds_per_rate": seconds,
            "server": {"command": server.started, "options": server_options, "exit_code": code},
            "client": f"open-loop Poisson arrivals, one text per request, from a separate process on the same "
                      f"machine ({cores} cores): it takes CPU from the server (client_cpu_share)",
            "search_seconds": round(time.monotonic() - began, 1)}


def load_table(load: dict) -> str:
    lines = ["| offered req/s | achieved req/s | p50 ms | p95 ms | p99 ms | errors | client CPU | within p95 |",
             "|---:|---:|---:|---:|---:|---:|---:|:---:|"]
    for r in load["rates"]:
        lines.append(f"| {r['offered_rps']:.1f} | {r['achieved_rps']:.1f} | {r['p50_ms']:.1f} | {r['p95_ms']:.1f} | "
                     f"{r['p99_ms']:.1f} | {r['errors']} | {r['client_cpu_share'] * 100:.0f} % | "
                     f"{'yes' if r['passes'] else 'no'} |")
    cap = load["capacity_rps"]
    lines += ["", f"capacity_rps: {cap:.1f} (the highest rate with p95 ≤ {load['max_p95_ms']:g} ms and no errors)"
              if cap is not None else f"capacity_rps: none — no rate kept p95 ≤ {load['max_p95_ms']:g} ms without errors",
              f"server: {load['server']['command']}", f"client: {load['client']}; texts: {load['texts']}"]
    return "\n".join(lines)
