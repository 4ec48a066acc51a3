"""Time and peak memory of `shrinkwrap predict` on hostile input, each case in a process of its own.

    .venv/bin/python benchmarks/predict_hostile.py [--artifact runs/demo/artifact] [--lines 1000000]
                                                   [--out benchmarks/out/predict_hostile]

Cases (input files written under --out first):
  baseline      one short line: the fixed cost of loading the artifact
  huge-line     one 10 MB line of words: predict tokenises a prefix (artifact.encode)
  huge-whole    the same line tokenised whole by the tokenizers library, as predict did before (for comparison;
                not predict itself: the tokenizer call alone)
  hostile-mix   NUL bytes, control characters, bidi marks, mixed scripts, emoji, 5,000-emoji line
  many-lines    --lines short lines (1,000,000 by default), classified 4,096 at a time
Peak RSS is the child's ru_maxrss (os.wait4). Prints a Markdown table and writes predict_hostile.json.
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

WHOLE = """
import sys
from tokenizers import Tokenizer
tok = Tokenizer.from_file(sys.argv[1]); tok.enable_truncation(int(sys.argv[3]))
text = open(sys.argv[2], encoding="utf-8").read().rstrip("\\n")
e = tok.encode_batch([text])[0]
print(len(e.ids), len(e.overflowing))
"""


def _measure(cmd: list[str]) -> dict:
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - start
    err = proc.stderr.read().decode(errors="replace")
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"{' '.join(cmd[:4])} … failed: {err.strip()[-500:]}")
    return {"seconds": round(seconds, 2), "peak_rss_mb": round(usage.ru_maxrss / 1024, 1)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--artifact", default=str(ROOT / "runs" / "demo" / "artifact"))
    ap.add_argument("--lines", type=int, default=1_000_000)
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "predict_hostile"))
    args = ap.parse_args()
    art, out = Path(args.artifact), Path(args.out)
    if not (art / "manifest.json").is_file():
        raise SystemExit(f"{art}: no artifact there — run `make demo` first or give --artifact")
    out.mkdir(parents=True, exist_ok=True)
    max_length = json.loads((art / "manifest.json").read_text())["tokenizer"]["max_length"]

    words = ["refund", "outage", "password", "please", "the", "meter", "invoice", "tariff"]
    files = {
        "baseline": ["my meter reading is wrong"],
        "huge-line": [" ".join(words[i % len(words)] for i in range(1_500_000))[:10_000_000]],
        "hostile-mix": ["refund\x00\x00 invoice", "\x01\x02\x1b[31m outage \x7f", "пароль 登录 كلمة 🔐🚀 login",
                        "\u200b\u202e reversed \ufeff", "🙂" * 5000],
        "many-lines": [f"ticket {i}: my {words[i % len(words)]} is wrong" for i in range(args.lines)],
    }
    for name, lines in files.items():
        (out / f"{name}.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")

    predict = [sys.executable, "-m", "shrinkwrap", "predict", str(art), "--file"]
    rows = {}
    for name in files:
        rows[name] = {"lines": len(files[name]), **_measure([*predict, str(out / f"{name}.txt")])}
        print(f"{name}: {rows[name]}", file=sys.stderr, flush=True)
    rows["huge-whole"] = {"lines": 1, **_measure([sys.executable, "-c", WHOLE, str(art / "tokenizer.json"),
                                                  str(out / "huge-line.txt"), str(max_length)])}
    print("| case | lines | seconds | peak RSS (MB) |\n|---|---:|---:|---:|")
    for name, r in rows.items():
        print(f"| {name} | {r['lines']:,} | {r['seconds']} | {r['peak_rss_mb']} |")
    (out / "predict_hostile.json").write_text(json.dumps(
        {"machine": {"cpus": os.cpu_count(), "python": platform.python_version()}, "artifact": art.name,
         "max_length": max_length, "cases": rows}, indent=2))
    for name in files:
        (out / f"{name}.txt").unlink()


if __name__ == "__main__":
    main()
