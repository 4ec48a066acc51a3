"""An artifact folder loads unchanged in optimum's ONNX Runtime sequence-classification model (the hub-style
class users of ONNX Runtime know) and gives the labels `shrinkwrap predict` gives."""
from __future__ import annotations

import json
import subprocess
import sys

from conftest import ROOT, keyword_rows


def test_artifact_loads_in_optimum_with_predicts_labels(tiny_run, tmp_path):
    import numpy as np
    from optimum.onnxruntime import ORTModelForSequenceClassification
    from transformers import AutoTokenizer

    art = tiny_run / "artifact"
    texts = [t for t, _ in keyword_rows(40, seed=7)]
    (tmp_path / "texts.txt").write_text("\n".join(texts) + "\n", encoding="utf-8")
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", str(art), "--file", str(tmp_path / "texts.txt")],
                          capture_output=True, text=True, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    ours = [json.loads(line)["label"] for line in proc.stdout.splitlines()]

    model = ORTModelForSequenceClassification.from_pretrained(art)  # the folder as it ships
    tokenizer = AutoTokenizer.from_pretrained(art)
    max_length = json.loads((art / "manifest.json").read_text())["tokenizer"]["max_length"]
    enc = tokenizer(texts, padding=True, truncation=True, max_length=max_length, return_tensors="np")
    logits = np.asarray(model(**enc).logits)
    theirs = [model.config.id2label[int(i)] for i in logits.argmax(1)]
    assert theirs == ours
    assert len(set(ours)) > 1  # a real comparison: the texts get more than one label
