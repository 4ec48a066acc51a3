"""A search candidate's *untrained* student, in the shapes its run would ship: the teacher's layers kept
(or the student's own start), its heads and neurons removed, its vocabulary cut, then exported and
made int8 exactly as the chain's ONNX steps do. Latency and size depend on these shapes alone, so this
graph is timed and sized in place of the trained one before anything is trained.

Which heads and neurons go does not change a shape, so the lowest-numbered ones are removed here
(training removes the least important); the vocabulary kept is the one the trimming step would keep.
"""
from __future__ import annotations

import shutil
from pathlib import Path
from types import SimpleNamespace

import torch

from shrinkwrap.distillation import build_student
from shrinkwrap.fingerprint import sha256_json
from shrinkwrap.models import num_layers
from shrinkwrap.onnx_ops import export_checked, quantize_dynamic
from shrinkwrap.rundir import MODEL_FILE, scratch

PARITY_TEXTS = 8   # the export's parity check, on a few test texts (the weights are not the shipped ones)


class Shapes:
    """Builds candidates' untrained int8 graphs from one context (its teacher loaded once)."""

    def __init__(self, ctx):
        from shrinkwrap.models import load_classifier

        self.ctx = ctx
        self.teacher = load_classifier(str(ctx.outputs["teacher"]))
        self._kept: list[int] | None = None
        self._trimmed = None

    def kept_vocabulary(self) -> list[int]:
        """The pieces the trimming step keeps: specials and every piece of the training and transfer texts."""
        from shrinkwrap.vocab import special_ids, trimmed_tokenizer, used_ids

        if self._kept is None:
            ctx, train = self.ctx, self.ctx.data.train
            used = set(special_ids(ctx.tokenizer)) | used_ids(ctx.tokenizer, list(train.texts) + list(train.pairs or []))
            for batch in ctx.transfer_batches():
                used |= used_ids(ctx.tokenizer, batch)
            self._kept = sorted(used)
            self._new = {old: new for new, old in enumerate(self._kept)}
            self._trimmed = trimmed_tokenizer(ctx.tokenizer, self._kept)
        return self._kept

    def student(self, recipe):
        """(the untrained student in the candidate's shapes, the kept vocabulary or None)."""
        from shrinkwrap.pruning import least_important, neurons_to_remove, remove_heads, remove_neurons
        from shrinkwrap.vocab import trim_embeddings

        student, _ = build_student(SimpleNamespace(recipe=recipe, data=self.ctx.data), self.teacher)
        p = recipe.prune
        if p.enabled:
            layers, cfg = num_layers(student), student.config
            remove_heads(student, least_important(torch.zeros(layers, cfg.num_attention_heads), p.heads_removed))
            width = cfg.intermediate_size
            remove_neurons(student, least_important(torch.zeros(layers, width),
                                                    neurons_to_remove(width, p.neurons_removed_share)))
        kept = None
        if recipe.trim_vocab.enabled:
            kept = self.kept_vocabulary()
            trim_embeddings(student, kept, self._new_id(self.ctx.tokenizer.pad_token_id))
        return student.eval(), kept

    def _new_id(self, old: int | None) -> int | None:
        return self._new.get(old) if old is not None else None

    def untrained_int8(self, recipe, root: Path) -> Path:
        """root/<shape hash>/model.onnx: the candidate's untrained int8 graph, beside its config and
        tokenizer (reused when its shapes, export and int8 settings are those of one made before)."""
        from shrinkwrap.batches import collate

        ctx = self.ctx
        student, kept = self.student(recipe)
        shapes = {k: list(v.shape) for k, v in student.state_dict().items()}
        d = recipe.model_dump(mode="json")
        folder = root / sha256_json({"shapes": shapes, "export": d["export"], "onnx_quantize": d["onnx_quantize"]})[:16]
        if (folder / MODEL_FILE).exists():
            return folder
        examples, tokenizer, pad = ctx.encoded["test"][:PARITY_TEXTS], ctx.tokenizer, ctx.pad_id
        if kept is not None:  # ids of the cut vocabulary; pieces outside it read as [UNK], as the cut tokenizer does
            unk = self._new_id(ctx.tokenizer.unk_token_id) or 0
            examples = [{**e, "input_ids": [self._new.get(t, unk) for t in e["input_ids"]]}
                        for e in examples]
            tokenizer, pad = self._trimmed, self._new_id(pad) or 0
        b = recipe.bench
        timing = collate(examples[:1] * b.batch_size, pad,
                         length=min(b.sequence_length, recipe.student.max_length or recipe.teacher.max_length))
        with scratch(folder) as tmp:
            fp32 = tmp / "fp32"
            fp32.mkdir()
            export_checked(student, examples, pad, timing, recipe.export, b.threads, fp32,
                           what="search (an untrained candidate)")
            q = recipe.onnx_quantize
            quantize_dynamic(fp32 / MODEL_FILE, tmp / MODEL_FILE, q.per_channel, q.int8_operators)
            shutil.rmtree(fp32)
            student.config.save_pretrained(tmp)
            tokenizer.save_pretrained(tmp)
        return folder
