"""Serving under load, side by side in one run: capacity with and without batching, 1 worker × 2 threads against
2 workers × 1 thread, a soak, and an overload — each goal said met or not.

    .venv/bin/python benchmarks/serving.py runs/demo/artifact --data recipes/data/support_tickets.csv
        [--max-p95-ms 20] [--load-seconds 10] [--load-minutes 5] [--soak-requests 100000] [--overload-seconds 10]

1. Capacity (`shrinkwrap bench --load`'s stepped search, bench/capacity.py): the highest rate of one-text requests
   whose client-side p95 stays within --max-p95-ms with every answer a 200, for four servers in turn: 1 worker ×
   2 threads (serve's defaults on 2 cores) and 2 workers × 1 thread, each with batching (the defaults: 16 texts,
   5 ms) and without (--max-batch 1). Goal: with batching ≥ 1.5 × without, same workers and threads.
2. Soak: --soak-requests requests at 70 % of the batching capacity of the first server, 1 % of them malformed (four
   kinds in turn). Goal: every well-formed one answered 200 with predict's labels, every malformed one a 4xx, no 5xx,
   the workers' resident memory at the end within 10 % of what it was after the first 1,000 requests.
3. Overload: 3 × the highest of the four capacities, for --overload-seconds. Goal: 503s, no worker lost, and the
   service answers within --max-p95-ms again within one second of the load dropping (a probe sends one request
   every 50 ms throughout).

The load generator runs in a process of its own on the same machine (its CPU share is in each row). Prints the
tables and the verdicts, and writes benchmarks/out/serving.json.
"""
from __future__ import annotations

import argparse
import http.client
import json
import os
import sys
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out" / "serving.json"
MALFORMED = [b'{"texts": [', b'["not an object"]', b'{"texts": "a string"}', b'{"texts": [], "other": 1}']


def rss_of_workers(pid: int) -> int:
    import psutil

    return sum(p.memory_info().rss for p in psutil.Process(pid).children(recursive=True)
               if "resource_tracker" not in " ".join(p.cmdline()))


def expected_bodies(artifact: str, rows: list, malformed_share: float):
    """Well-formed one-text bodies with the labels predict gives each text alone, and malformed ones among them."""
    from shrinkwrap.bench.load import Body
    from shrinkwrap.serve.artifact import load

    model = load(artifact, 1)
    pairs = [p for _, p in rows] if rows and rows[0][1] is not None else None
    labels = [r["label"] for r in model.predict([t for t, _ in rows], 1, pairs=pairs)]
    good = [Body(json.dumps({"texts": [t], **({"text_pairs": [p]} if p else {})}).encode(), [label])
            for (t, p), label in zip(rows, labels)]
    every = int(round(1 / malformed_share))
    out = []
    for i in range(len(good) * every):
        out.append(Body(MALFORMED[(i // every) % len(MALFORMED)]) if i % every == every - 1 else good[i % len(good)])
    return out


def probe(port: int, stop: threading.Event, log: list) -> None:
    """One request every 50 ms: (send time as time.time(), ms, status)."""
    body = json.dumps({"texts": ["probe"]}).encode()
    while not stop.is_set():
        sent, at = time.perf_counter(), time.time()
        try:
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
            conn.request("POST", "/predict", body=body, headers={"Content-Type": "application/json"})
            r = conn.getresponse()
            r.read()
            status = r.status
            conn.close()
        except OSError:
            status = 0
        log.append((at, (time.perf_counter() - sent) * 1000, status))
        stop.wait(max(0.0, 0.05 - (time.perf_counter() - sent)))


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("artifact")
    p.add_argument("--data", help="texts to send (as `bench --load --data`); default: words of the vocabulary")
    p.add_argument("--text", default="text", help="text column of --data (default: text)")
    p.add_argument("--max-p95-ms", type=float, default=20.0, help="p95 the capacities are measured at (default: 20)")
    p.add_argument("--load-seconds", type=float, default=10.0, help="seconds per rate (default: 10)")
    p.add_argument("--load-minutes", type=float, default=5.0, help="time limit of each capacity search (default: 5)")
    p.add_argument("--soak-requests", type=int, default=100_000, help="requests of the soak (default: 100000)")
    p.add_argument("--overload-seconds", type=float, default=10.0, help="seconds at 3x capacity (default: 10)")
    args = p.parse_args()

    from shrinkwrap.bench.capacity import HOST, Server, measure_load, request_texts
    from shrinkwrap.bench.load import Plan, run_rate, summarize
    from shrinkwrap.bench.machine import describe

    started, load_before = time.perf_counter(), os.getloadavg()[0]
    cores = describe()["cores_available"]
    log = lambda m: print(f"[serving] {m}", file=sys.stderr, flush=True)   # noqa: E731
    rows, about = request_texts(args.artifact, args.data, args.text, None, 64)
    configs = [("1 worker × 2 threads, batching (serve's defaults on 2 cores)", ["--workers=1", "--threads=2"]),
               ("1 worker × 2 threads, --max-batch 1", ["--workers=1", "--threads=2", "--max-batch=1"]),
               ("2 workers × 1 thread, batching", ["--workers=2", "--threads=1"]),
               ("2 workers × 1 thread, --max-batch 1", ["--workers=2", "--threads=1", "--max-batch=1"])]
    capacity = {}
    for name, options in configs:
        log(f"capacity: {name}")
        capacity[name] = measure_load(args.artifact, options, rows, [], args.load_seconds, args.max_p95_ms,
                                      args.load_minutes * 60, log)
    caps = {k: v["capacity_rps"] or 0.0 for k, v in capacity.items()}
    goals = {}
    for workers in ("1 worker × 2 threads", "2 workers × 1 thread"):
        with_b = next(v for k, v in caps.items() if k.startswith(f"{workers}, batching"))
        without = caps[f"{workers}, --max-batch 1"]
        ratio = with_b / without if without else float("inf") if with_b else 0.0
        goals[f"batching ≥ 1.5 × no batching, {workers}"] = {"ratio": ratio, "met": ratio >= 1.5}

    # Soak and overload on the first server (serve's defaults on 2 cores): at 70 % of its capacity, and at 3 × the
    # highest capacity measured, so that it is past what any of the four holds
    base = caps[configs[0][0]] or 1.0
    heavy_rate = 3 * max(max(caps.values()), base)
    server = Server(args.artifact, configs[0][1])
    soak, overload = {}, {}
    try:
        bodies = expected_bodies(args.artifact, rows, 0.01)
        rate = 0.7 * base
        log(f"soak: 1,000 requests at {rate:.0f}/s, then {args.soak_requests - 1000:,}")
        first = summarize(run_rate(Plan(HOST, server.port, bodies, rate, 1000 / rate, seed=1, check=True)), cores)
        rss_first = rss_of_workers(server.proc.pid)
        rest = summarize(run_rate(Plan(HOST, server.port, bodies, rate, (args.soak_requests - 1000) / rate, seed=2,
                                       check=True)), cores)
        rss_end = rss_of_workers(server.proc.pid)
        fives = sum(v for k, v in {**first["statuses"], **rest["statuses"]}.items() if k.startswith("5") or k == "0")
        soak = {"rate": rate, "phases": [first, rest], "rss_after_1000": rss_first, "rss_end": rss_end,
                "rss_change": rss_end / rss_first - 1}
        goals["soak: every request answered as it must be, memory within 10 %"] = {
            "met": all(ph["errors"] == 0 and ph["wrong_answers"] == 0 and ph["malformed_not_4xx"] == 0 for ph in (first, rest))
            and fives == 0 and abs(soak["rss_change"]) <= 0.10}

        log(f"overload: {heavy_rate:.0f}/s for {args.overload_seconds:g} s, probing every 50 ms")
        stop, probes = threading.Event(), []
        prober = threading.Thread(target=probe, args=(server.port, stop, probes), daemon=True)
        prober.start()
        heavy = summarize(run_rate(Plan(HOST, server.port, bodies[:len(rows)], heavy_rate, args.overload_seconds,
                                        seed=3)), cores)
        dropped = heavy["started_at"] + args.overload_seconds   # the last scheduled request of the overload
        time.sleep(3)
        stop.set()
        prober.join(60)
        # recovered: the first probe sent after the drop that is answered 200 within the p95 limit, when answered
        recovered = next((t + ms / 1000 - dropped for t, ms, s in probes
                          if t >= dropped and s == 200 and ms <= args.max_p95_ms), None)
        alive = server.proc.poll() is None
        overload = {"rate": heavy_rate, "row": heavy, "recovery_s": recovered, "server_alive": alive}
        goals["overload: 503s, no crash, recovered within 1 s"] = {
            "met": heavy["statuses"].get("503", 0) > 0 and alive and recovered is not None and recovered <= 1.0}
    finally:
        code = server.stop()
    workers_lost = "exited" in server.log
    overload["workers_restarted"] = workers_lost
    overload["server_exit_code"] = code

    machine = describe()
    lines = ["| server | capacity req/s at p95 ≤ {:g} ms | rates tried |".format(args.max_p95_ms), "|---|---:|---:|"]
    lines += [f"| {k} | {caps[k]:.0f} | {len(v['rates'])} |" for k, v in capacity.items()]
    lines += ["", "| goal | met |", "|---|:---:|"]
    lines += [f"| {k}{' (' + format(v['ratio'], '.2f') + '×)' if 'ratio' in v else ''} | {'yes' if v['met'] else 'NO'} |"
              for k, v in goals.items()]
    caption = (f"{machine['cpu']}, {cores} cores, load average {load_before:.1f} before, {os.getloadavg()[0]:.1f} "
               f"after; texts: {about}; the load generator shares the machine"
               + (" — the machine was busier than its cores: rerun on a quiet one" if load_before > cores else ""))
    print("\n".join(lines) + "\n\n" + caption)
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps({"what": caption, "capacity": capacity, "goals": goals, "soak": soak,
                               "overload": overload, "machine": machine, "settings": vars(args),
                               "seconds": round(time.perf_counter() - started, 1)}, indent=2, default=float))
    log(f"wrote {OUT} ({time.perf_counter() - started:.0f} s)")
    return 0 if all(v["met"] for v in goals.values()) else 1


if __name__ == "__main__":
    raise SystemExit(main())
