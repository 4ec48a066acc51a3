"""An open-loop load generator: requests sent at Poisson arrival times whatever the answers are doing, as
independent callers send them (a closed loop, which waits for each answer before the next request, would slow
down with the server and hide its queueing). Each request's latency runs from its scheduled send time to its
answer, so a client that falls behind shows up in the figures rather than lowering the load.

It runs in a process of its own (`run_rate` spawns it), so that its CPU time is measured apart from the
server's; it shares the machine with the server all the same, and the table says so. HTTP is the standard
library's http.client, one keep-alive connection per sender thread; everything is bounded in count and time.
"""
from __future__ import annotations

import http.client
import json
import multiprocessing
import queue
import threading
import time
from dataclasses import dataclass, field
from typing import Optional

import numpy as np

# Concurrent connections; more requests in flight than this wait in the client's queue (their wait counts in their
# latency). Above the server's queue (64 texts a worker by default), so that an overload reaches the server and is
# refused there.
SENDERS = 256
REQUEST_TIMEOUT_S = 30.0
CONNECTION_ERROR = 0    # the status recorded when no HTTP answer came (refused, reset, timed out)


@dataclass
class Body:
    """A request body and what a correct answer is: the labels `predict` gives its texts, or None for a
    malformed body, which must get a 4xx."""
    data: bytes
    labels: Optional[list] = None


@dataclass
class Plan:
    host: str
    port: int
    bodies: list[Body]
    rate: float
    seconds: float
    seed: int = 0
    check: bool = False              # compare every answer's labels with the body's
    senders: int = SENDERS


@dataclass
class Outcome:
    offered_rps: float
    sent: int
    statuses: dict = field(default_factory=dict)     # status -> count (0: no HTTP answer)
    latency_ms: list = field(default_factory=list)   # of the 200 answers, from the scheduled send time
    wrong: int = 0                                   # 200 answers whose labels differ from the body's
    malformed_4xx: int = 0                           # malformed bodies refused as they must be
    malformed_not_4xx: int = 0
    late_ms_p95: float = 0.0                         # how late the client handed requests to its senders
    wall_s: float = 0.0
    cpu_s: float = 0.0
    started_at: float = 0.0                          # time.time() of the schedule's start


def arrivals(rate: float, seconds: float, seed: int) -> np.ndarray:
    """Poisson arrival times in [0, seconds): exponential gaps of mean 1 / rate."""
    rng = np.random.default_rng(seed)
    gaps = rng.exponential(1.0 / rate, size=int(rate * seconds * 1.5) + 16)
    times = np.cumsum(gaps)
    while times[-1] < seconds:  # rare: draw on
        times = np.concatenate([times, times[-1] + np.cumsum(rng.exponential(1.0 / rate, size=len(gaps)))])
    return times[times < seconds]


def drive(plan: Plan) -> Outcome:
    """Sends the plan's requests and gathers the answers (in the calling process)."""
    times = arrivals(plan.rate, plan.seconds, plan.seed)
    jobs: queue.SimpleQueue = queue.SimpleQueue()
    records: list = [None] * len(times)
    late = np.zeros(len(times))
    start = time.perf_counter() + 0.05
    started_at = time.time() + 0.05

    def sender():
        conn, used = http.client.HTTPConnection(plan.host, plan.port, timeout=REQUEST_TIMEOUT_S), False
        while (job := jobs.get()) is not None:
            i = job
            body = plan.bodies[i % len(plan.bodies)]
            for attempt in (1, 2):
                try:
                    conn.request("POST", "/predict", body=body.data, headers={"Content-Type": "application/json"})
                    response = conn.getresponse()
                    status, data = response.status, response.read()
                    used = True
                    break
                except (OSError, http.client.HTTPException) as e:
                    conn.close()
                    conn = http.client.HTTPConnection(plan.host, plan.port, timeout=REQUEST_TIMEOUT_S)
                    status, data = CONNECTION_ERROR, b""
                    # A kept-alive connection the server closed while idle fails before the request reached it:
                    # sent again once on a new connection, as HTTP clients do (RFC 9112, 9.3.1).
                    stale = used and isinstance(e, (http.client.RemoteDisconnected, BrokenPipeError,
                                                    ConnectionResetError))
                    used = False
                    if not stale:
                        break
            records[i] = (status, (time.perf_counter() - start - times[i]) * 1000, _verdict(body, status, data, plan))
        conn.close()

    threads = [threading.Thread(target=sender, daemon=True) for _ in range(plan.senders)]
    for t in threads:
        t.start()
    cpu = time.process_time()
    for i, at in enumerate(times):
        delay = start + at - time.perf_counter()
        if delay > 0:
            time.sleep(delay)
        late[i] = -delay * 1000 if delay < 0 else 0.0
        jobs.put(i)
    for _ in threads:
        jobs.put(None)
    deadline = time.perf_counter() + REQUEST_TIMEOUT_S + 5
    for t in threads:
        t.join(max(0.0, deadline - time.perf_counter()))
    out = Outcome(offered_rps=plan.rate, sent=len(times), wall_s=time.perf_counter() - start,
                  cpu_s=time.process_time() - cpu, late_ms_p95=float(np.percentile(late, 95)) if len(late) else 0.0,
                  started_at=started_at)
    for record in records:
        status, ms, verdict = record if record is not None else (CONNECTION_ERROR, 0.0, None)
        out.statuses[status] = out.statuses.get(status, 0) + 1
        if status == 200:
            out.latency_ms.append(ms)
        out.wrong += verdict == "wrong"
        out.malformed_not_4xx += verdict == "malformed not 4xx"
        out.malformed_4xx += verdict == "malformed 4xx"
    return out


def _verdict(body: Body, status: int, data: bytes, plan: Plan) -> Optional[str]:
    if body.labels is None:
        return "malformed 4xx" if 400 <= status < 500 else "malformed not 4xx"
    if not plan.check or status != 200:
        return None
    try:
        got = [row["label"] for row in json.loads(data)["predictions"]]
    except (ValueError, KeyError, TypeError):
        return "wrong"
    return None if got == body.labels else "wrong"


def _child(plan: Plan, results) -> None:
    results.put(drive(plan))


def run_rate(plan: Plan) -> Outcome:
    """`drive` in a spawned process of its own; bounded: it is ended if it outlives its plan by a minute."""
    context = multiprocessing.get_context("spawn")
    results = context.Queue()
    child = context.Process(target=_child, args=(plan, results), daemon=True)
    child.start()
    try:
        outcome = results.get(timeout=plan.seconds + REQUEST_TIMEOUT_S + 60)
    finally:
        child.join(10)
        if child.is_alive():
            child.kill()
            child.join()
    return outcome


def summarize(o: Outcome, cores: int) -> dict:
    """One row of the load table."""
    lat = np.asarray(o.latency_ms) if o.latency_ms else np.zeros(1)
    answered = o.statuses.get(200, 0)
    return {"offered_rps": o.offered_rps, "sent": o.sent, "achieved_rps": answered / o.wall_s if o.wall_s else 0.0,
            "p50_ms": float(np.percentile(lat, 50)), "p95_ms": float(np.percentile(lat, 95)),
            "p99_ms": float(np.percentile(lat, 99)), "ok": answered,
            "errors": o.sent - answered - o.malformed_4xx,   # every answer but a 200, or a 4xx to a malformed body
            "statuses": {str(k): v for k, v in sorted(o.statuses.items())}, "wrong_answers": o.wrong,
            "malformed_not_4xx": o.malformed_not_4xx, "client_late_p95_ms": o.late_ms_p95,
            "client_cpu_share": o.cpu_s / o.wall_s / cores if o.wall_s else 0.0, "seconds": o.wall_s,
            "started_at": o.started_at}
