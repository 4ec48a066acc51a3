"""Two CPU processes (gloo backend) through torch's own launcher, as `torchrun` would start them."""
import json
import os
import socket
import subprocess
import sys

from conftest import tiny_recipe, write_recipe


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_two_processes_train_once_and_match_one_process(tmp_path, tiny_base, keyword_csv, tiny_run):
    recipe = write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv))
    out = tmp_path / "run"
    env = dict(os.environ, MASTER_ADDR="127.0.0.1")
    proc = subprocess.run(
        [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node", "2", "--master_addr", "127.0.0.1",
         "--master_port", str(_free_port()), "-m", "shrinkwrap", "run", str(recipe), "--out", str(out),
         "--until", "student"],
        capture_output=True, text=True, env=env, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    # written once, by the main process: one table on stdout, one results file, no helper leftovers
    assert proc.stdout.count("| teacher | pytorch |") == 1
    results = json.loads((out / "results.json").read_text())
    assert [s["name"] for s in results["steps"]] == ["teacher", "student"]
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".")) == []   # no scratch folders left
    assert not list((out / "cache").rglob("*.rank*"))                              # shards merged
    assert not list(out.rglob("checkpoint"))                                       # finished steps carry none
    # Same effective batch (16: 8 per process) and seed as the one-process tiny run. Dropout masks are
    # drawn per process, so the runs are not bitwise equal; on this easy 3-class task both must learn it,
    # and the test accuracies agree within 10 points (stated tolerance).
    single = json.loads((tiny_run / "results.json").read_text())
    for i in (0, 1):
        two, one = results["steps"][i]["metrics"]["accuracy"], single["steps"][i]["metrics"]["accuracy"]
        assert abs(two - one) <= 0.10, (results["steps"][i]["name"], two, one)
        assert two >= 0.8


def test_precision_is_ignored_on_cpu_with_a_notice(tmp_path, tiny_base, keyword_csv):
    recipe = tiny_recipe(tiny_base, keyword_csv, train={"precision": "bf16"})
    path = write_recipe(tmp_path / "r.yaml", recipe)
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(path), "--out", str(tmp_path / "run"),
                           "--until", "teacher"], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "train.precision = bf16 is for GPUs: training in fp32 on this CPU" in proc.stderr


def test_two_processes_distil_from_a_transfer_file_built_once(tmp_path, tiny_base, keyword_csv, tiny_run_copy):
    from conftest import keyword_rows

    transfer = tmp_path / "more.txt"
    # 117 labelled + 300 transfer texts = 26 batches of 16 and 1 left over: fewer than the 2 processes,
    # so that last one is left out of the epoch (a process with no rows would stall the gradient exchange)
    transfer.write_text("\n".join(t for t, _ in keyword_rows(300, seed=5)) + "\n", encoding="utf-8")
    recipe = tiny_recipe(tiny_base, keyword_csv, student={"transfer_path": str(transfer)})

    def run(until: str, timeout: int):
        path = write_recipe(tmp_path / "r.yaml", recipe)
        return subprocess.run(
            [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node", "2", "--master_addr", "127.0.0.1",
             "--master_port", str(_free_port()), "-m", "shrinkwrap", "run", str(path), "--out", str(tiny_run_copy),
             "--until", until],
            capture_output=True, text=True, env=dict(os.environ, MASTER_ADDR="127.0.0.1"), timeout=timeout)

    proc = run("student", 600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    student = json.loads((tiny_run_copy / "results.json").read_text())["steps"][1]
    assert student["info"]["transfer_texts"] == 300
    assert student["metrics"]["accuracy"] >= 0.8
    tables = list((tiny_run_copy / "cache").glob("transfer-*"))
    assert len(tables) == 1 and (tables[0] / "texts" / "dataset_info.json").exists()
    assert len(list(tables[0].glob("tokens-*.arrow"))) == 1
    assert not list((tiny_run_copy / "cache").rglob("*partial*"))

    # A step that does not train runs in the main process alone, the other waiting: vocabulary trimming
    # reads the transfer table there, in a new run that reuses the student (no one else joins a wait).
    recipe["trim_vocab"] = {"enabled": True}
    proc = run("student-trimmed", 300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    steps = json.loads((tiny_run_copy / "results.json").read_text())["steps"]
    trimmed = next(s for s in steps if s["name"] == "student-trimmed")
    assert trimmed["info"]["texts"] == 117 + 300


def test_two_processes_distil_a_sentence_encoder_with_the_teacher_s_vectors_computed_sharded(tmp_path, tiny_base,
                                                                                              keyword_csv):
    """task: embedding under the launcher: the teacher's vectors over the training and transfer texts computed by
    both processes, each its shard, merged into one cache; the student trained on them by both."""
    import numpy as np
    from conftest import keyword_rows
    from test_embedding import embedding_recipe

    transfer = tmp_path / "more.txt"
    transfer.write_text("\n".join(t for t, _ in keyword_rows(300, seed=5)) + "\n", encoding="utf-8")
    recipe = embedding_recipe(tiny_base, keyword_csv, student={"transfer_path": str(transfer)})
    path, out = write_recipe(tmp_path / "r.yaml", recipe), tmp_path / "run"
    proc = subprocess.run(
        [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node", "2", "--master_addr", "127.0.0.1",
         "--master_port", str(_free_port()), "-m", "shrinkwrap", "run", str(path), "--out", str(out),
         "--until", "student"],
        capture_output=True, text=True, env=dict(os.environ, MASTER_ADDR="127.0.0.1"), timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    teacher, student = json.loads((out / "results.json").read_text())["steps"]
    assert student["info"]["transfer_texts"] == 300
    assert not list((out / "cache").rglob("*.rank*"))                              # shards merged
    # the student's recorded vectors are the ones its metrics were computed from: its cosine to the teacher's
    mine, theirs = np.load(out / "student" / "test_outputs.npy"), np.load(out / "teacher" / "test_outputs.npy")
    cos = (mine * theirs).sum(1) / np.linalg.norm(mine, axis=1) / np.linalg.norm(theirs, axis=1)
    assert abs(float(cos.mean()) - student["metrics"]["cosine_to_teacher"]) <= 1e-5
    assert teacher["metrics"]["neighbour_recall_at_10"] == 1.0


def test_two_processes_search_trains_every_candidate_together(tmp_path, tiny_base, keyword_csv):
    """`search` under the launcher: the teacher and every candidate (the short halving runs too) train on
    both processes; the screen, the choices and the files are the main process's alone."""
    r = tiny_recipe(tiny_base, keyword_csv, teacher={"epochs": 3}, student={"num_layers": 1, "epochs": 2},
                    quantize={"enabled": False}, bench={"warm_seconds": 0},
                    budget={"size_mb": 0.6, "accuracy_drop_points": 100})
    # Size separates the candidates by their shapes alone (as in test_search): the untrimmed two are refused.
    r["search"] = {"trim_vocab.enabled": [False, True], "student.max_length": [16, 32], "rounds": 2,
                   "strategy": "halving"}
    recipe = write_recipe(tmp_path / "search.yaml", r)
    out = tmp_path / "out"
    proc = subprocess.run(
        [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node", "2", "--master_addr", "127.0.0.1",
         "--master_port", str(_free_port()), "-m", "shrinkwrap", "search", str(recipe), "--out", str(out)],
        capture_output=True, text=True, env=dict(os.environ, MASTER_ADDR="127.0.0.1"), timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert proc.stdout.count("search: ") == 1 and proc.stdout.count("winner: candidate") == 1, proc.stdout
    rows = json.loads((out / "search.json").read_text())["candidates"]
    assert [r["trained"] for r in rows] == [False, False, True, True]
    dropped = [i for i, r in enumerate(rows) if (r["reason"] or "").startswith("dropped by successive halving")]
    assert len(dropped) == 1
    winner = json.loads((out / "search.json").read_text())["winner"]
    assert winner == ({2, 3} - set(dropped)).pop() and rows[winner]["meets_budget"]
    # The teacher's outputs were computed by both processes, a share each, and merged once.
    metas = [json.loads(p.read_text()) for p in (out / "cache").rglob("meta.json")]
    assert metas and all(m["processes"] == 2 for m in metas)
    # Both short runs and the full one exist, each finished and written once (no scratch folders left).
    assert len(list((out / "halving").iterdir())) == 2
    for run in [*(out / "halving").iterdir(), *(out / "candidates").iterdir()]:
        assert (run / "results.json").exists()
        assert sorted(p.name for p in run.iterdir() if p.name.startswith(".")) == []
