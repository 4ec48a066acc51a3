"""PyTorch dynamic int8 (step student-int8): every Linear layer's weights int8, activations quantised at run time.
Its folder holds the config, the tokenizer and the quantised state dict, loaded weights-only."""
from __future__ import annotations

import copy
import json
import pickle
import warnings
from pathlib import Path

import torch
from torch import nn

from shrinkwrap.ml.tasks import of_folder, of_model
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import INT8_WEIGHTS

INT8_INFO = "int8.json"


def quantize_dynamic_int8(model: nn.Module) -> nn.Module:
    from torch.ao.quantization import quantize_dynamic

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return quantize_dynamic(model, {nn.Linear}, dtype=torch.qint8)


def save_int8(model_fp32: nn.Module, tokenizer, folder: Path) -> None:
    """An int8 folder: the config, the tokenizer and the quantised state dict (loaded weights-only)."""
    qmodel = quantize_dynamic_int8(copy.deepcopy(model_fp32).eval())
    of_model(model_fp32).save_config(model_fp32, folder)
    tokenizer.save_pretrained(folder)
    torch.save(qmodel.state_dict(), folder / INT8_WEIGHTS)
    (folder / INT8_INFO).write_text(json.dumps({"method": "torch dynamic int8", "modules": ["Linear"],
                                                "weights": INT8_WEIGHTS}, indent=2))


def load_int8(folder: str | Path) -> nn.Module:
    from transformers import AutoConfig

    folder = Path(folder)
    config = AutoConfig.from_pretrained(folder)
    model = of_folder(folder).skeleton(folder, config).eval()
    qmodel = quantize_dynamic_int8(model)
    # weights_only: a state dict holds tensors and nothing that could run code when unpickled.
    try:
        with warnings.catch_warnings():
            # torch's own unpickler of quantised tensors (torch._utils._rebuild_qtensor) reads the storage's
            # dtype and device through the deprecated TypedStorage: torch's call, not one we can change.
            warnings.filterwarnings("ignore", message="TypedStorage is deprecated", category=UserWarning)
            state = torch.load(folder / INT8_WEIGHTS, weights_only=True)
    except pickle.UnpicklingError:
        raise UserError(f"{folder / INT8_WEIGHTS}: refused — not a plain-tensor state dict (a weights-only load "
                        f"failed)") from None
    qmodel.load_state_dict(state)
    return qmodel.eval()
