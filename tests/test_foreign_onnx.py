"""`shrinkwrap bench` on ONNX graphs it did not write: a matrix of encoders exported and transformed here
(fp32, fused by ONNX Runtime's optimizer, dynamic int8 with quantised embeddings, static QDQ, fp16, weights
in an external data file, no token_type_ids input, int32 inputs, an embedding table behind a hand-made
dequantisation). Each must tell its vocabulary size (or fall back with a notice) and be timed; graphs are
checked with onnx.checker and run with onnxruntime. And a graph whose external data points outside its folder
is refused before loading."""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from shrinkwrap.bench.grid import Point, point_batches
from shrinkwrap.bench.targets import SAFE_VOCAB, load_target
from shrinkwrap.cli import main
from shrinkwrap.serve.errors import UserError

VOCAB = 30522  # the bundled uncased WordPiece of tiny_base
FAST = ["--repeats", "3", "--timed-seconds", "0", "--warmup", "0", "--warm-seconds", "0", "--sequence-length", "16",
        "--json"]


@pytest.fixture(scope="module")
def encoder(tiny_base, tmp_path_factory) -> Path:
    """The tiny BERT encoder (no head) exported by torch.onnx, alone in its folder (no config.json)."""
    import torch
    from transformers import BertModel

    model = BertModel.from_pretrained(tiny_base).eval()
    folder = tmp_path_factory.mktemp("fp32")
    ids = torch.ones(1, 8, dtype=torch.long)
    torch.onnx.export(model, (ids, ids, torch.zeros_like(ids)), str(folder / "encoder.onnx"), dynamo=False,
                      input_names=["input_ids", "attention_mask", "token_type_ids"], output_names=["last_hidden_state"],
                      dynamic_axes={n: {0: "b", 1: "t"} for n in ["input_ids", "attention_mask", "token_type_ids"]},
                      opset_version=17)
    onnx.checker.check_model(str(folder / "encoder.onnx"))
    return folder / "encoder.onnx"


def _embedding_name(model) -> str:
    gather = next(n for n in model.graph.node if n.op_type == "Gather" and "input_ids" in n.input)
    return gather.input[0]


def _save(model, folder: Path, name="model.onnx", **kw) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    onnx.save(model, str(folder / name), **kw)
    onnx.checker.check_model(str(folder / name))
    return folder / name


def _hand_dequantised(src: Path, out: Path) -> Path:
    """The word-embedding table stored int8; the lookup reads Mul(Sub(Cast(q), zero point), scale)."""
    m = onnx.load(str(src))
    name = _embedding_name(m)
    w = next(i for i in m.graph.initializer if i.name == name)
    table = numpy_helper.to_array(w)
    scale = np.float32(np.abs(table).max() / 127)
    q = np.round(table / scale).astype(np.int8)
    m.graph.initializer.remove(w)
    m.graph.initializer.extend([numpy_helper.from_array(q, "emb_q"), numpy_helper.from_array(np.float32(0), "emb_zp"),
                                numpy_helper.from_array(scale, "emb_scale")])
    m.graph.node.insert(0, helper.make_node("Mul", ["emb_centred", "emb_scale"], [name]))
    m.graph.node.insert(0, helper.make_node("Sub", ["emb_f", "emb_zp"], ["emb_centred"]))
    m.graph.node.insert(0, helper.make_node("Cast", ["emb_q"], ["emb_f"], to=TensorProto.FLOAT))
    return _save(m, out)


def _int32_inputs(src: Path, out: Path) -> Path:
    m = onnx.load(str(src))
    for inp in m.graph.input:
        old = inp.name
        inp.type.tensor_type.elem_type = TensorProto.INT32
        for node in m.graph.node:
            node.input[:] = [f"{old}_64" if x == old else x for x in node.input]
        m.graph.node.insert(0, helper.make_node("Cast", [old], [f"{old}_64"], to=TensorProto.INT64))
    return _save(m, out)


def _no_token_types(src: Path, out: Path) -> Path:
    m = onnx.load(str(src))
    inp = next(i for i in m.graph.input if i.name == "token_type_ids")
    m.graph.input.remove(inp)
    shape = helper.make_node("Shape", ["input_ids"], ["tt_shape"])
    zeros = helper.make_node("ConstantOfShape", ["tt_shape"], ["token_type_ids"],
                             value=helper.make_tensor("z", TensorProto.INT64, [1], [0]))
    m.graph.node.insert(0, zeros)
    m.graph.node.insert(0, shape)
    return _save(m, out)


def _variant(kind: str, encoder: Path, tiny_base: Path, root: Path) -> Path:
    from transformers import BertConfig

    from shrinkwrap.ml.convert import fuse, quantize_dynamic, quantize_static_qdq

    out = root / kind
    out.mkdir()
    if kind == "fp32":
        return Path(shutil.copy(encoder, out / "model.onnx"))
    if kind == "fused":
        return fuse(encoder, BertConfig.from_pretrained(tiny_base), out / "model.onnx")
    if kind == "dynamic-int8-embeddings":
        quantize_dynamic(encoder, out / "model.onnx", per_channel=False, op_types=["MatMul", "Gather"])
        return out / "model.onnx"
    if kind == "static-qdq":
        rng = np.random.default_rng(0)
        calib = [{"input_ids": rng.integers(0, VOCAB, 12).tolist(), "attention_mask": [1] * 12,
                  "token_type_ids": [0] * 12} for _ in range(4)]
        quantize_static_qdq(encoder, out / "model.onnx", calib, 0, per_channel=False, op_types=["MatMul", "Gather"])
        return out / "model.onnx"
    if kind == "fp16":
        from onnxruntime.transformers.float16 import convert_float_to_float16

        return _save(convert_float_to_float16(onnx.load(str(encoder)), keep_io_types=True), out)
    if kind == "external-data":
        return _save(onnx.load(str(encoder)), out, save_as_external_data=True, location="weights.bin",
                     size_threshold=0)
    if kind == "no-token-type-ids":
        return _no_token_types(encoder, out)
    if kind == "int32-inputs":
        return _int32_inputs(encoder, out)
    if kind == "hand-dequantised-embeddings":
        return _hand_dequantised(encoder, out)
    raise AssertionError(kind)


KINDS = ["fp32", "fused", "dynamic-int8-embeddings", "static-qdq", "fp16", "external-data", "no-token-type-ids",
         "int32-inputs", "hand-dequantised-embeddings"]


@pytest.mark.parametrize("kind", KINDS)
def test_bench_times_a_foreign_encoder(kind, encoder, tiny_base, tmp_path, capsys):
    path = _variant(kind, encoder, tiny_base, tmp_path)
    target = load_target(path, threads=1)
    assert target.vocab_size() == VOCAB, kind  # read from the graph, following the lookup back to its table
    if kind == "no-token-type-ids":
        assert "token_type_ids" not in target.input_names
    batch = point_batches(Point(2, 16), target, None, 0)[0]
    hidden = target.outputs(batch)
    assert hidden.shape[:2] == (2, 16) and np.isfinite(hidden).all()
    if kind == "external-data":
        assert {p.name for p in target.weight_files} == {"model.onnx", "weights.bin"}
    target.release()
    assert main(["bench", str(path), *FAST]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["latency"][0]["n"] >= 3 and result["size_bytes"] > 0


def _untraceable(encoder: Path, out: Path) -> Path:
    """The table reaches the lookup through Transpose -> Transpose: not a dequantisation, so not followed."""
    m = onnx.load(str(encoder))
    name = _embedding_name(m)
    w = next(i for i in m.graph.initializer if i.name == name)
    t = numpy_helper.to_array(w).T.copy()
    m.graph.initializer.remove(w)
    m.graph.initializer.append(numpy_helper.from_array(t, "emb_t"))
    m.graph.node.insert(0, helper.make_node("Transpose", ["emb_t"], [name], perm=[1, 0]))
    return _save(m, out)


def test_vocabulary_from_config_beside_else_a_safe_range_with_a_notice(encoder, tmp_path, capsys):
    path = _untraceable(encoder, tmp_path / "odd")
    target = load_target(path, threads=1)
    assert target.vocab_size() is None
    batch = point_batches(Point(1, 16), target, None, 0)[0]
    assert batch["input_ids"].max() < SAFE_VOCAB
    assert "every BERT-family vocabulary" in capsys.readouterr().err
    (path.parent / "config.json").write_text(json.dumps({"vocab_size": 30522}))
    assert load_target(path, threads=1).vocab_size() == 30522


def _hostile(encoder: Path, folder: Path, location: str) -> Path:
    """A graph whose weights say they are at `location`; a file is put there so that only the check refuses."""
    m = onnx.load(str(encoder))
    _save(m, folder, save_as_external_data=True, location="weights.bin", size_threshold=0)
    m = onnx.load(str(folder / "model.onnx"), load_external_data=False)
    for t in m.graph.initializer:
        for e in t.external_data:
            if e.key == "location":
                e.value = location
    onnx.save(m, str(folder / "model.onnx"))
    return folder / "model.onnx"


@pytest.mark.parametrize("location", ["../outside.bin", "/etc/hostname", "sub/../../outside.bin"])
def test_external_data_outside_the_folder_is_refused_before_loading(location, encoder, tmp_path, capsys):
    shutil.copy(encoder, tmp_path / "outside.bin")
    path = _hostile(encoder, tmp_path / "g", location)
    with pytest.raises(UserError, match="outside the graph's folder"):
        load_target(path, threads=1)
    assert main(["bench", str(path), *FAST]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "outside the graph's folder" in err[0]


def test_a_link_out_of_the_folder_is_refused(encoder, tmp_path):
    path = _hostile(encoder, tmp_path / "g", "weights.bin")
    (tmp_path / "g" / "weights.bin").rename(tmp_path / "elsewhere.bin")
    (tmp_path / "g" / "weights.bin").symlink_to(tmp_path / "elsewhere.bin")
    with pytest.raises(UserError, match="outside the graph's folder"):
        load_target(path, threads=1)
