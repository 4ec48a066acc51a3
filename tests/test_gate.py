"""`shrinkwrap gate`: budgets -> verdicts -> exit codes and JUnit XML, on copies of the tiny run's results."""
import json
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET

import pytest
import yaml

from shrinkwrap.recipe.budget import BudgetConfig

ROOT = __import__("pathlib").Path(__file__).resolve().parents[1]


def gate(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", "gate", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd or ROOT, timeout=120)


@pytest.fixture
def results(tiny_run, tmp_path):
    """A private copy of the tiny run's results.json (the fixture itself is read-only), its timings marked steady:
    what the gate does with an unstable one is tested on its own (test_steady_timing.py)."""
    data = json.loads((tiny_run / "results.json").read_text())
    for step in data["steps"]:
        step["latency_ms"]["unstable"] = False
    dst = tmp_path / "results.json"
    dst.write_text(json.dumps(data))
    return dst


def final(path):
    return json.loads(path.read_text())["steps"][-1]


def edit(path, change):
    data = json.loads(path.read_text())
    change(data)
    path.write_text(json.dumps(data))
    return path


def budget_file(tmp_path, name="budget.yaml", **keys):
    path = tmp_path / name
    path.write_text(yaml.safe_dump(keys), encoding="utf-8")
    return path


def passing_budget(step):
    lat = step["latency_ms"]
    return {"latency_p95_ms": lat["p95"] * 2, "batch_size": lat["batch_size"], "sequence_length": lat["sequence_length"],
            "latency_p95_over_reference": lat["p95_over_reference"] * 2, "size_mb": step["size_bytes"] / 1e6 * 1.5,
            "accuracy_drop_points": step["accuracy_drop"] + 1, "min_accuracy": step["metrics"]["accuracy"] / 2}


def test_budget_that_passes_exits_0_and_lists_every_limit(results, tmp_path):
    step = final(results)
    keys = passing_budget(step)
    r = gate(results, "--budget", budget_file(tmp_path, **keys))
    assert r.returncode == 0, r.stdout + r.stderr
    rows = {line.split()[0]: line for line in r.stdout.splitlines()[2:] if line and not line.startswith("gate")}
    limits = set(keys) - {"batch_size", "sequence_length"}
    assert set(rows) == limits
    assert all(" pass " in rows[k] for k in limits)
    assert step["name"] in r.stdout.splitlines()[0]  # the final step is gated by default


def test_budget_that_fails_exits_1_naming_the_failing_limit(results, tmp_path):
    step = final(results)
    keys = passing_budget(step) | {"size_mb": step["size_bytes"] / 1e6 / 2}
    r = gate(results, "--budget", budget_file(tmp_path, **keys))
    assert r.returncode == 1, r.stdout + r.stderr
    failed = [line for line in r.stdout.splitlines() if line.startswith("gate FAILED")]
    assert len(failed) == 1 and "size_mb" in failed[0]
    assert [line.split()[0] for line in r.stdout.splitlines() if " FAIL " in line] == ["size_mb"]


def test_latency_limit_fails_when_p95_exceeds_it(results, tmp_path):
    step = final(results)
    r = gate(results, "--budget", budget_file(tmp_path, latency_p95_ms=step["latency_ms"]["p95"] / 2))
    assert r.returncode == 1
    assert "latency_p95_ms" in [line for line in r.stdout.splitlines() if line.startswith("gate FAILED")][0]


def test_junit_xml_parses_with_right_counts(results, tmp_path):
    step = final(results)
    keys = passing_budget(step) | {"size_mb": step["size_bytes"] / 1e6 / 2,
                                   "min_accuracy": 1.0 if step["metrics"]["accuracy"] < 1 else 0.5,
                                   "latency_p95_ms": step["latency_ms"]["p95"] / 3}
    junit = tmp_path / "gate.xml"
    r = gate(results, "--budget", budget_file(tmp_path, **keys), "--junit", junit)
    n_fail = 2 + (step["metrics"]["accuracy"] < 1)
    assert r.returncode == 1
    root = ET.parse(junit).getroot()  # source: xml.etree parses it, so any JUnit reader can
    suites = root.findall("testsuite")
    assert len(suites) == 1
    cases = suites[0].findall("testcase")
    assert len(cases) == 5 and int(suites[0].get("tests")) == 5 and int(root.get("tests")) == 5
    failing = {c.get("name") for c in cases if c.find("failure") is not None}
    assert int(suites[0].get("failures")) == len(failing) == n_fail
    assert {"size_mb", "latency_p95_ms"} <= failing
    for c in cases:
        if c.get("name") in failing:
            assert c.get("name") in c.find("failure").get("message")


def test_malformed_budget_yaml_exits_2(results, tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("latency_p95_ms: [12\n", encoding="utf-8")
    r = gate(results, "--budget", bad)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "not valid YAML" in r.stderr and "Traceback" not in r.stderr


@pytest.mark.parametrize("keys,words", [
    ({"latency_p95": 10}, ["unknown key latency_p95", "latency_p95_ms"]),
    ({"size_mb": -3}, ["size_mb = -3", "greater than 0"]),
    ({"min_accuracy": 1.5}, ["min_accuracy = 1.5"]),
    ({"regression": {"p95_percnt": 5}}, ["unknown key regression.p95_percnt", "p95_percent"]),
    ({}, ["expected a mapping"]),
])
def test_bad_budget_keys_exit_2_naming_the_key(results, tmp_path, keys, words):
    path = budget_file(tmp_path, **keys) if keys else tmp_path / "empty.yaml"
    if not keys:
        path.write_text("", encoding="utf-8")
    r = gate(results, "--budget", path)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and all(w in r.stderr for w in words), r.stderr


def test_missing_results_file_exits_2(tmp_path):
    r = gate(tmp_path / "nope.json", "--budget", budget_file(tmp_path, size_mb=1))
    assert r.returncode == 2 and "no such results file" in r.stderr


def test_results_without_the_reference_ratio_exit_2(results, tmp_path):
    edit(results, lambda d: d["steps"][-1]["latency_ms"].pop("p95_over_reference"))
    r = gate(results, "--budget", budget_file(tmp_path, latency_p95_over_reference=5))
    assert r.returncode == 2 and "latency_ms.p95_over_reference" in r.stderr


def test_latency_measured_at_another_batch_is_bad_input(results, tmp_path):
    lat = final(results)["latency_ms"]
    r = gate(results, "--budget", budget_file(tmp_path, latency_p95_ms=1000, batch_size=lat["batch_size"] + 7))
    assert r.returncode == 2
    assert f"batch_size {lat['batch_size']}" in r.stderr and f"batch_size is {lat['batch_size'] + 7}" in r.stderr


def test_upper_confidence_bound_is_stricter_than_the_point_drop(results, tmp_path):
    def widen(d):
        d["steps"][-1]["accuracy_drop"] = 1.0
        d["steps"][-1]["accuracy_drop_ci95"] = [-0.5, 3.0]
    edit(results, widen)
    assert gate(results, "--budget", budget_file(tmp_path, accuracy_drop_points=2)).returncode == 0
    r = gate(results, "--budget", budget_file(tmp_path, accuracy_drop_points=2, accuracy_drop_upper_bound=True))
    assert r.returncode == 1 and "accuracy_drop_points: 3 points is above the limit 2 points" in r.stdout


def test_step_option_and_json_output(results, tmp_path):
    r = gate(results, "--budget", budget_file(tmp_path, min_accuracy=0.01), "--step", "teacher", "--json")
    assert r.returncode == 0
    out = json.loads(r.stdout)
    assert out["step"] == "teacher" and out["passed"] is True
    assert [c["name"] for c in out["checks"]] == ["min_accuracy"]
    assert out["checks"][0]["measured"] == json.loads(results.read_text())["steps"][0]["metrics"]["accuracy"]
    r = gate(results, "--budget", budget_file(tmp_path, min_accuracy=0.01), "--step", "studnt")
    assert r.returncode == 2 and "student-onnx-int8" in r.stderr


def test_budget_defaults_to_the_recipe_budget_in_results(results, tmp_path):
    size = final(results)["size_bytes"] / 1e6
    edit(results, lambda d: d["recipe"].update(budget={"size_mb": size / 2}))
    r = gate(results)
    assert r.returncode == 1 and "size_mb" in r.stdout and "recipe.budget" in r.stdout
    edit(results, lambda d: d["recipe"].update(budget={}))
    r = gate(results)
    assert r.returncode == 2 and "sets no limit" in r.stderr


def test_regression_mode_passes_against_itself(results, tmp_path):
    r = gate(results, "--budget", budget_file(tmp_path, min_accuracy=0.01), "--baseline", results,
             "--tolerance", "p95_percent=10", "--tolerance", "accuracy_points=0.5", "--tolerance", "size_percent=1")
    assert r.returncode == 0, r.stdout + r.stderr
    for name in ("regression.p95_percent", "regression.accuracy_points", "regression.size_percent"):
        assert any(line.startswith(name) and " pass " in line for line in r.stdout.splitlines())


def test_regression_mode_fails_when_slower_or_less_accurate_than_baseline(results, tmp_path):
    baseline = tmp_path / "baseline.json"
    shutil.copy(results, baseline)

    def faster_and_better(d):  # the baseline was twice as fast and 5 points more accurate
        lat = d["steps"][-1]["latency_ms"]
        lat["p95"] /= 2
        lat["p95_over_reference"] /= 2
        d["steps"][-1]["metrics"]["accuracy"] += 0.05
    edit(baseline, faster_and_better)
    budget = budget_file(tmp_path, regression={"p95_percent": 20, "accuracy_points": 1})
    r = gate(results, "--budget", budget, "--baseline", baseline, "--junit", tmp_path / "j.xml")
    assert r.returncode == 1
    failed = " ".join(line for line in r.stdout.splitlines() if line.startswith("gate FAILED"))
    assert "regression.p95_percent: 100 %" in failed and "regression.accuracy_points: 5 points" in failed
    assert int(ET.parse(tmp_path / "j.xml").getroot().get("failures")) == 2
    # A tolerance wide enough lets the same comparison pass.
    r = gate(results, "--budget", budget, "--baseline", baseline, "--tolerance", "p95_percent=150",
             "--tolerance", "accuracy_points=6")
    assert r.returncode == 0, r.stdout


def test_regression_needs_a_baseline_and_a_tolerance(results, tmp_path):
    budget = budget_file(tmp_path, min_accuracy=0.01)
    r = gate(results, "--budget", budget, "--baseline", results)
    assert r.returncode == 2 and "no regression tolerance" in r.stderr
    r = gate(results, "--budget", budget, "--tolerance", "p95_percent=5")
    assert r.returncode == 2 and "--baseline" in r.stderr
    r = gate(results, "--budget", budget, "--baseline", results, "--tolerance", "p95_percent=fast")
    assert r.returncode == 2 and "not a number" in r.stderr


def test_run_with_a_recipe_budget_gates_after_writing_results(tiny_run, tiny_run_copy):
    recipe = tiny_run.parent / "recipe.yaml"  # the tiny run's own recipe: every step is reused, only the gate is new
    size = final(tiny_run_copy / "results.json")["size_bytes"] / 1e6

    def run(limit):
        return subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(recipe), "--out", str(tiny_run_copy),
                               "--set", f"budget.size_mb={limit}"], capture_output=True, text=True, cwd=ROOT,
                              timeout=300)

    r = run(size / 2)
    assert r.returncode == 1, r.stdout + r.stderr
    assert "gate FAILED — size_mb" in r.stdout
    written = json.loads((tiny_run_copy / "results.json").read_text())
    assert written["recipe"]["budget"]["size_mb"] == pytest.approx(size / 2)  # results written before the verdict
    assert (tiny_run_copy / "report.html").is_file()
    r = run(size * 2)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "gate passed: 1 of 1 limits met" in r.stdout


def test_budget_file_and_recipe_budget_share_one_schema(tmp_path):
    from shrinkwrap.recipe.budget import load_budget

    keys = {"latency_p95_ms": 20, "size_mb": 30, "accuracy_drop_points": 1.5, "min_accuracy": 0.8,
            "regression": {"p95_percent": 10}}
    assert load_budget(budget_file(tmp_path, **keys)) == BudgetConfig.model_validate(keys)


def test_recipe_budget_shape_must_match_the_benchmark():
    from shrinkwrap.recipe.schema import validate_recipe
    from shrinkwrap.serve.errors import UserError

    raw = {"name": "x", "data": {"path": "d.csv"}, "bench": {"batch_size": 1},
           "budget": {"latency_p95_ms": 10, "batch_size": 8}}
    with pytest.raises(UserError, match=r"^r\.yaml: budget\.batch_size = 8 but bench\.batch_size = 1"):
        validate_recipe(raw, "r.yaml")
    raw["budget"] = {"accuracy_drop_upper_bound": True}
    with pytest.raises(UserError, match=r"^r\.yaml: budget — accuracy_drop_upper_bound is set — set accuracy_drop_points"):
        validate_recipe(raw, "r.yaml")
    raw["budget"] = {"sequence_length": 128, "size_mb": 10}
    with pytest.raises(UserError, match=r"set a latency limit too"):
        validate_recipe(raw, "r.yaml")


def _class_drop(data, drop):
    """The final step's first class loses `drop` of its recall vs the teacher."""
    teacher, last = data["steps"][0], data["steps"][-1]
    last["metrics"]["per_class"]["recall"][0] = teacher["metrics"]["per_class"]["recall"][0] - drop


@pytest.mark.parametrize("key,break_it,allowed", [
    ("max_class_recall_drop_points", lambda d: _class_drop(d, 0.5), 10),
    ("min_agreement", lambda d: d["steps"][-1].update(agreement_with_teacher=0.5), 0.9),
    ("max_ece", lambda d: d["steps"][-1]["calibration"].update(ece=0.3), 0.1),
])
def test_new_limits_fail_naming_what_broke_and_pass_when_met(results, tmp_path, key, break_it, allowed):
    def meet(d):
        last = d["steps"][-1]
        last["metrics"]["per_class"]["recall"] = list(d["steps"][0]["metrics"]["per_class"]["recall"])
        last["agreement_with_teacher"] = 1.0
        last["calibration"]["ece"] = 0.01
    edit(results, meet)
    budget = budget_file(tmp_path, **{key: allowed})
    junit = tmp_path / "gate.xml"
    ok = gate(results, "--budget", budget, "--junit", junit)
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert [c.get("name") for c in ET.parse(junit).getroot().iter("testcase")] == [key]
    edit(results, break_it)
    bad = gate(results, "--budget", budget, "--junit", junit)
    assert bad.returncode == 1, bad.stdout + bad.stderr
    assert f"gate FAILED — {key}" in bad.stdout
    if key == "max_class_recall_drop_points":
        name = json.loads(results.read_text())["data"]["label_names"][0]
        assert f"class {name!r}" in bad.stdout and "lost" in bad.stdout
    assert ET.parse(junit).getroot().find(".//failure") is not None


def test_gate_prints_cautions_after_the_table_on_stderr(results, tmp_path):
    def small_split(d):
        last = d["steps"][-1]
        last["accuracy_drop"], last["accuracy_drop_ci95"] = 0.5, [-1.0, 4.0]
    edit(results, small_split)
    r = gate(results, "--budget", budget_file(tmp_path, accuracy_drop_points=2))
    assert r.returncode == 0, r.stdout + r.stderr
    line = next(l for l in r.stderr.splitlines() if "too small to show the budget is met" in l)
    assert line.startswith("caution: ")
def test_regression_mode_fails_when_larger_than_baseline(results, tmp_path):
    # A baseline that really regresses on size only: 4/5 of today's bytes, so today is 25 % larger
    # (hand-worked: 1 / 0.8 - 1 = 0.25); latency and accuracy are unchanged and must pass.
    baseline = tmp_path / "baseline.json"
    shutil.copy(results, baseline)
    edit(baseline, lambda d: d["steps"][-1].update(size_bytes=d["steps"][-1]["size_bytes"] * 0.8))
    budget = budget_file(tmp_path, regression={"size_percent": 10, "p95_percent": 10, "accuracy_points": 1})
    r = gate(results, "--budget", budget, "--baseline", baseline)
    assert r.returncode == 1, r.stdout
    failed = [line for line in r.stdout.splitlines() if line.startswith("gate FAILED")]
    assert len(failed) == 1 and "regression.size_percent: 25 %" in failed[0], r.stdout
    r = gate(results, "--budget", budget_file(tmp_path, regression={"size_percent": 30}), "--baseline", baseline)
    assert r.returncode == 0, r.stdout
