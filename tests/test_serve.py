"""`shrinkwrap serve` over real HTTP on 127.0.0.1 (the server is started and stopped by each test, every wait
bounded): answers equal `predict`'s under 16 concurrent clients, bad requests get a 4xx with one line, a full queue
a 503 with Retry-After, /metrics is the Prometheus text format, SIGTERM answers what was accepted and exits 0;
`bench --load` measures rates and capacity_rps, and `gate --load` checks min_capacity_rps against it."""
import http.client
import io
import json
import re
import threading
import time
from concurrent.futures import ThreadPoolExecutor

import pytest
from conftest import keyword_rows

HOST = "127.0.0.1"
SCORE_TOLERANCE = 1e-5


def _server(artifact, *options):
    from shrinkwrap.bench.capacity import Server

    return Server(str(artifact), [str(o) for o in options])


def _post(port, body, path="/predict", method="POST", headers=None) -> tuple[int, dict, bytes]:
    conn = http.client.HTTPConnection(HOST, port, timeout=60)
    try:
        data = body if isinstance(body, bytes) else json.dumps(body).encode()
        conn.request(method, path, body=data if method == "POST" else None,
                     headers={"Content-Type": "application/json", **(headers or {})})
        r = conn.getresponse()
        return r.status, {k.lower(): v for k, v in r.getheaders()}, r.read()
    finally:
        conn.close()


def _predict_rows(artifact, texts, min_confidence: float = 0.0) -> list[dict]:
    from shrinkwrap.serve.predict import run_predict

    out = io.StringIO()
    assert run_predict(str(artifact), texts, None, 32, 1, stdout=out, min_confidence=min_confidence) == 0
    return [json.loads(line) for line in out.getvalue().splitlines()]


# ---- the Prometheus text exposition format (prometheus.io/docs/instrumenting/exposition_formats, version 0.0.4)

_NAME = r"[a-zA-Z_:][a-zA-Z0-9_:]*"
_LABEL = r'[a-zA-Z_][a-zA-Z0-9_]*="(?:[^"\\\n]|\\\\|\\"|\\n)*"'
_SAMPLE = re.compile(rf"^({_NAME})(?:\{{((?:{_LABEL})(?:,{_LABEL})*)?,?\}})? (\S+)(?: -?\d+)?$")
_TYPES = ("counter", "gauge", "histogram", "summary", "untyped")


def parse_exposition(text: str) -> dict:
    """{metric family: {"type", "samples": [(name, {label: value}, float)]}} — every line checked against the
    format's grammar: HELP and TYPE comments, a TYPE before its family's first sample, values Go-float parseable."""
    families: dict = {}
    assert text.endswith("\n"), "the last line must end with a line feed"
    for line in text.splitlines():
        if not line.strip():
            continue
        if line.startswith("#"):
            parts = line.split(" ", 3)
            if len(parts) >= 3 and parts[1] in ("HELP", "TYPE"):
                assert re.fullmatch(_NAME, parts[2]), line
                if parts[1] == "TYPE":
                    assert parts[3] in _TYPES and parts[2] not in families, line
                    families[parts[2]] = {"type": parts[3], "samples": []}
            continue
        m = _SAMPLE.match(line)
        assert m, f"not a sample line: {line!r}"
        name, labels, value = m.group(1), m.group(2) or "", m.group(3)
        family = next((f for f in (name, re.sub(r"_(bucket|sum|count|total)$", "", name)) if f in families), None)
        assert family is not None, f"{name}: no TYPE line before its first sample"
        pairs = dict(re.findall(r'([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"', labels))
        families[family]["samples"].append((name, pairs, float(value.replace("Inf", "inf"))))
    return families


def check_histogram(family: dict) -> float:
    """Buckets cumulative, ending in le="+Inf", which equals _count (the format's histogram rules); returns _count."""
    buckets = [(float(l["le"].replace("Inf", "inf")), v) for n, l, v in family["samples"] if n.endswith("_bucket")]
    assert buckets and buckets[-1][0] == float("inf")
    assert [b for b, _ in buckets] == sorted(b for b, _ in buckets)
    assert all(a[1] <= b[1] for a, b in zip(buckets, buckets[1:]))
    count = next(v for n, _, v in family["samples"] if n.endswith("_count"))
    assert buckets[-1][1] == count
    return count


def _wait_for_queue(port, texts: int, limit_s: float = 30) -> None:
    """Until /metrics says `texts` texts are accepted and waiting (bounded)."""
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        samples = parse_exposition(_post(port, b"", path="/metrics", method="GET")[2].decode())
        if samples["shrinkwrap_queue_texts"]["samples"][0][2] == texts:
            return
        time.sleep(0.05)
    raise AssertionError(f"{texts} texts never waited in the queue within {limit_s} s")


def test_sixteen_clients_get_predicts_answers_and_bad_requests_get_one_line_4xx(tiny_run):
    art = tiny_run / "artifact"
    texts = [f"{t} {i}" for i, (t, _) in enumerate(keyword_rows(1000, seed=5))]
    want = {r["text"]: r for r in _predict_rows(art, texts)}
    server = _server(art, "--workers", 2, "--max-body-mb", 0.01)
    try:
        with ThreadPoolExecutor(16) as pool:   # 16 concurrent clients, one text per request, the default settings
            answers = list(pool.map(lambda t: _post(server.port, {"texts": [t]}), texts))
        assert sorted({status for status, _, _ in answers}) == [200]   # never a 503 at these defaults
        change = 0.0
        for text, (_, _, body) in zip(texts, answers):
            (row,) = json.loads(body)["predictions"]
            assert row["text"] == text and row["label"] == want[text]["label"]
            change = max(change, max(abs(row["scores"][k] - v) for k, v in want[text]["scores"].items()))
        assert change <= SCORE_TOLERANCE

        bad = {
            "malformed JSON": (b'{"texts": [', 400),
            "not an object": (b'["a text"]', 400),
            "unknown key": ({"texts": ["a"], "text": "a"}, 400),
            "wrong type": ({"texts": "a text"}, 400),
            "a number in the list": ({"texts": ["a", 3]}, 400),
            "empty list": ({"texts": []}, 400),
            "an empty text": ({"texts": ["  "]}, 400),
            "pairs to a single-text model": ({"texts": ["a"], "text_pairs": ["b"]}, 400),
            "too many texts": ({"texts": ["a"] * 17}, 413),
            "body over --max-body-mb": ({"texts": ["word " * 4000]}, 413),
        }
        for case, (body, status) in bad.items():
            got, _, data = _post(server.port, body)
            error = json.loads(data)["error"]
            assert got == status and isinstance(error, str) and error and "\n" not in error, case
        assert _post(server.port, b"", path="/nowhere")[0] == 404
        status, headers, _ = _post(server.port, b"", path="/predict", method="GET")
        assert status == 405 and headers["allow"] == "POST"

        status, headers, data = _post(server.port, b"", path="/metrics", method="GET")
        assert status == 200 and headers["content-type"].startswith("text/plain; version=0.0.4")
        families = parse_exposition(data.decode())
        requests = {(l["path"], l["status"]): v for _, l, v in families["shrinkwrap_requests_total"]["samples"]}
        assert families["shrinkwrap_requests_total"]["type"] == "counter"
        assert requests[("/predict", "200")] == 1000
        assert sum(v for (p, s), v in requests.items() if p == "/predict" and s.startswith("4")) == len(bad) + 1
        assert check_histogram(families["shrinkwrap_request_duration_seconds"]) == 1000 + len(bad) + 1
        batches = families["shrinkwrap_batch_texts"]
        assert check_histogram(batches) >= 1000 / 16
        assert next(v for n, _, v in batches["samples"] if n.endswith("_sum")) == 1000   # every text in one call
        assert families["shrinkwrap_queue_texts"]["type"] == "gauge"
    finally:
        assert server.stop() == 0
    # no line per request: after the start line (read at start), only the lines logged once a minute
    assert all(line.startswith("serve: last 60 s:") for line in server.log.splitlines())


def test_a_full_queue_gets_503_with_retry_after_and_the_waiting_request_its_answer(tiny_run):
    # --min-confidence 1: a text abstains (label null, scores kept) unless its top score is exactly 1, as in predict
    server = _server(tiny_run / "artifact", "--workers", 1, "--max-batch", 4, "--max-queue", 4, "--max-wait-ms", 5000,
                     "--min-confidence", 1)
    try:
        first: dict = {}
        waiting = threading.Thread(target=lambda: first.update(r=_post(server.port, {"texts": ["a", "b", "c"]})))
        waiting.start()
        _wait_for_queue(server.port, 3)   # the 3 texts wait up to 5 s for a fourth
        status, headers, data = _post(server.port, {"texts": ["d", "e"]})   # 3 + 2 > --max-queue 4
        assert status == 503 and headers["retry-after"] == "1" and "queue" in json.loads(data)["error"]
        waiting.join(30)
        assert first["r"][0] == 200
        rows = json.loads(first["r"][2])["predictions"]
        assert rows == _predict_rows(tiny_run / "artifact", ["a", "b", "c"], min_confidence=1.0)
        assert None in [r["label"] for r in rows]   # a top score below 1 abstains (one that rounds to 1 need not)
    finally:
        assert server.stop() == 0


def test_sigterm_answers_every_accepted_request_then_exits_0(tiny_run):
    server = _server(tiny_run / "artifact", "--workers", 1, "--max-batch", 8, "--max-wait-ms", 5000)
    answers: list = []
    clients = [threading.Thread(target=lambda i=i: answers.append(_post(server.port, {"texts": [f"router {i}"]})))
               for i in range(6)]
    for c in clients:
        c.start()
    _wait_for_queue(server.port, 6)   # accepted, and waiting for companions (up to 5 s) when the signal comes
    assert server.stop() == 0
    for c in clients:
        c.join(30)
    assert [a[0] for a in answers] == [200] * 6
    with pytest.raises(OSError):   # nothing listens any more
        _post(server.port, {"texts": ["late"]})


def test_a_modified_artifact_or_a_busy_port_stops_serve_before_it_listens(tiny_run, tmp_path):
    import shutil
    import socket
    import subprocess
    import sys

    art = tmp_path / "art"
    shutil.copytree(tiny_run / "artifact", art)
    (art / "labels.json").write_text('["a", "b", "c"]')
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "serve", str(art), "--port", "0"], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1 and "labels.json" in proc.stderr
    with socket.socket() as busy:
        busy.bind((HOST, 0))
        busy.listen()
        proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "serve", str(tiny_run / "artifact"), "--port",
                               str(busy.getsockname()[1])], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1 and "--port" in proc.stderr


def test_load_texts_come_from_data_or_from_the_artifact_s_vocabulary(tiny_run, keyword_csv):
    import csv

    from shrinkwrap.bench.capacity import request_texts

    rows, about = request_texts(str(tiny_run / "artifact"), str(keyword_csv), "text", None, 16)
    with open(keyword_csv, newline="") as f:
        first = [r["text"] for r in csv.DictReader(f)][:len(rows)]
    assert rows == [(t, None) for t in first] and about.startswith(f"the first {len(rows)} texts")
    drawn, about = request_texts(str(tiny_run / "artifact"), None, "text", None, 16)
    assert drawn and all(isinstance(t, str) and t and p is None for t, p in drawn) and "vocabulary" in about


def test_bench_load_reports_each_rate_and_gate_checks_min_capacity_rps(tiny_run, tmp_path, capsys):
    from shrinkwrap.cli import main

    out = tmp_path / "load.json"
    assert main(["bench", str(tiny_run / "artifact"), "--load", "20", "40", "--load-seconds", "1",
                 "--sequence-length", "16", "--workers", "1", "--max-p95-ms", "1000", "--out", str(out)]) == 0
    table = capsys.readouterr().out
    result = json.loads(out.read_text())
    rates = result["load"]["rates"]
    assert [r["offered_rps"] for r in rates] == [20, 40]
    for r in rates:
        assert r["errors"] == 0 and r["sent"] == r["ok"] > 0 and r["p50_ms"] <= r["p95_ms"] <= r["p99_ms"]
        assert 0 < r["client_cpu_share"] <= 1
    assert result["capacity_rps"] == 40 == result["load"]["capacity_rps"]
    assert "client CPU" in table and "capacity_rps: 40.0" in table

    ok, too_high = tmp_path / "ok.yaml", tmp_path / "high.yaml"
    ok.write_text("min_capacity_rps: 30\n")
    too_high.write_text("min_capacity_rps: 100000\n")
    assert main(["gate", "--load", str(out), "--budget", str(ok)]) == 0
    assert main(["gate", "--load", str(out), "--budget", str(too_high)]) == 1
    assert "min_capacity_rps" in capsys.readouterr().out
    assert main(["gate", "--load", str(out)]) == 2   # no budget to check it against
