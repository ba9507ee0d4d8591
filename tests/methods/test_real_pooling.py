"""Pooling + head on the real packaged checkpoints, checked against transformers' own classifier classes.

Ours is built the way a run builds it (harness.methods.head.HeadMethod: load_backbone, pad-token fix,
layer cut, pooler moved into the pooling module); the library's model is loaded independently from
the same checkpoint folder, and only the fresh head's weights (and the one embedding row our loader
adds for the new pad token) are copied across. The logits must agree.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import torch
from transformers import BertForSequenceClassification, LlamaForSequenceClassification

from harness.config import config_from_dict
from harness.data.task import Split, TaskData
from harness.methods.batches import pad_batch
from harness.methods.head import HeadMethod
from harness.models.assets import resolve_checkpoint

pytestmark = pytest.mark.slow

LABELS = ("billing", "delivery", "other")
TEXTS = [
    "Where is my parcel? It was due on Monday.",
    "You were charged twice for the March invoice, sorry about that.",
    "thanks!",
    "Can I change the delivery address after the order has shipped to the depot in Leith?",
]


def _method(checkpoint: str, layers: int | None = None, **method: object) -> HeadMethod:
    cfg = config_from_dict({"task": {"name": "pooling", "train": "-"},
                            "model": {"checkpoint": checkpoint, "layers": layers},
                            "method": {"kind": "head", "dropout": 0.0, **method}, "train": {"seed": 3}})
    empty = Split("train", (), (), ())
    return HeadMethod(cfg=cfg, data=TaskData(empty, empty, empty, LABELS, False))


def _scale_head(method: HeadMethod, seed: int) -> None:
    """Give the head O(1) weights: the fresh head's N(0, 0.02) logits are ~0.1, which hides differences."""
    g = torch.Generator().manual_seed(seed)
    linear = method.model.head.linear
    with torch.no_grad():
        linear.weight.copy_(torch.randn(linear.weight.shape, generator=g))
        if linear.bias is not None:
            linear.bias.copy_(torch.randn(linear.bias.shape, generator=g))


def _batch(method: HeadMethod, side: str = "right") -> dict[str, torch.Tensor]:
    items = method.encode(TEXTS, [0] * len(TEXTS))
    types = [it.extra["token_type_ids"] for it in items] if method.uses_type_ids else None  # type: ignore[index]
    return pad_batch([it.input_ids for it in items], method.tokenizer.pad_token_id, side=side, type_ids=types)


def test_minilm_first_pooling_through_pooler_equals_bert_for_sequence_classification() -> None:
    # Reference: transformers' BertForSequenceClassification computes
    # classifier(dropout(pooler(hidden[:, 0]))) with the checkpoint's trained pooler (dense + tanh).
    ours = _method("asset:minilm-l6", pooling="first", use_pooler=True)
    _scale_head(ours, seed=0)
    lib = BertForSequenceClassification.from_pretrained(resolve_checkpoint("minilm-l6"), num_labels=len(LABELS))
    lib.classifier.load_state_dict(ours.model.head.linear.state_dict())
    ours.model.eval()
    lib.eval()
    batch = _batch(ours)
    assert int(batch["attention_mask"].sum(1).min()) < batch["input_ids"].shape[1]  # the batch really is padded
    with torch.no_grad():
        want = lib(**batch).logits  # (batch, labels)
        got = ours.logits(batch)
    assert want.abs().max() > 0.5  # logits of a size where a wrong pooling would show
    torch.testing.assert_close(got, want, atol=1e-5, rtol=0)


def test_smollm2_last_pooling_equals_llama_for_sequence_classification(tmp_path: Path) -> None:
    # Reference: transformers' LlamaForSequenceClassification scores the last token that is not
    # config.pad_token_id with a bias-free `score` layer. Our loader gives SmolLM2 a pad token of its
    # own (eos is SmolLM2's pad in its tokenizer config), so locating by pad id is exact here.
    # Cut to the first 3 of 30 layers for speed: a cut model is still the checkpoint's real weights
    # (embeddings, the layers kept, the final norm). Tolerance 1e-4: fp32 through a real Llama stack.
    layers = 3
    ours = _method("asset:smollm2-135m", layers=layers, pooling="last")  # model.layers, as a config sets it
    assert ours.tokenizer.pad_token_id != ours.tokenizer.eos_token_id
    assert ours.backbone.config.num_hidden_layers == layers
    _scale_head(ours, seed=1)
    folder = resolve_checkpoint("smollm2-135m")
    # The library's own way of loading fewer layers: a smaller config; later layers' weights go unused.
    lib = LlamaForSequenceClassification.from_pretrained(folder, num_labels=len(LABELS), num_hidden_layers=layers)
    pad = ours.tokenizer.pad_token_id
    lib.resize_token_embeddings(len(ours.tokenizer), mean_resizing=False)  # the new row is copied from ours below
    with torch.no_grad():
        lib.model.embed_tokens.weight[pad] = ours.model.backbone.get_input_embeddings().weight[pad]
    lib.config.pad_token_id = pad
    # The library's `score` has no bias; ours has one (harness.methods.head): it is added to the reference.
    linear = ours.model.head.linear
    lib.score.weight.data.copy_(linear.weight.data)
    bias = linear.bias.detach() if linear.bias is not None else torch.zeros(len(LABELS))
    ours.model.eval()
    lib.eval()
    right = _batch(ours, "right")
    assert int(right["attention_mask"].sum(1).min()) < right["input_ids"].shape[1]
    with torch.no_grad():
        want = lib(input_ids=right["input_ids"], attention_mask=right["attention_mask"]).logits + bias  # (batch, labels)
        got_right = ours.logits(right)
        got_left = ours.logits(_batch(ours, "left"))  # ours finds the last token from the mask: either side works
    assert want.abs().max() > 0.5
    torch.testing.assert_close(got_right, want, atol=1e-4, rtol=0)
    torch.testing.assert_close(got_left, want, atol=1e-4, rtol=0)

