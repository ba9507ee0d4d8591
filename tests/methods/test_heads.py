"""Pooling modules and the fresh head, checked against the transformers library's own classifier classes."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from sklearn.utils.class_weight import compute_class_weight
from transformers import AutoTokenizer, BertForSequenceClassification, GPT2ForSequenceClassification

from harness.errors import HarnessError
from harness.methods.batches import pad_batch
from harness.methods.head import class_weights
from harness.methods.pooling import (
    POOLINGS,
    ClassifierHead,
    FirstPooling,
    HeadModel,
    LastPooling,
    build_pooling,
    position_ids_from_mask,
    resolve_pooling,
)

TEXTS = ["the ferry to Tullagh was late again", "lost my phone", "is there a lift on the Gannet for a wheelchair?"]


def _batch(tokenizer, texts, side="right"):
    ids = [tokenizer(t)["input_ids"] for t in texts]
    return pad_batch(ids, tokenizer.pad_token_id, side=side)


def _gpt2_pair(path, num_labels=3):
    """The library's GPT-2 classifier and our last-pooling model sharing its transformer and score weights."""
    lib = GPT2ForSequenceClassification.from_pretrained(path, num_labels=num_labels).eval()
    head = ClassifierHead(lib.config.hidden_size, num_labels, dropout=0.0, seed=0, bias=False)
    head.linear.weight.data.copy_(lib.score.weight.data)
    ours = HeadModel(lib.transformer, LastPooling(), head, "decoder").eval()
    return lib, ours


def test_last_pooling_matches_gpt2_for_sequence_classification(toy_paths):
    # Reference: transformers' GPT2ForSequenceClassification scores the last non-pad token with a bias-free
    # `score` layer. With right padding and a pad token distinct from eos, ours must give the same logits.
    tok = AutoTokenizer.from_pretrained(toy_paths["decoder"])
    assert tok.pad_token_id != tok.eos_token_id  # the toy pads with <pad>, not <|endoftext|>
    lib, ours = _gpt2_pair(toy_paths["decoder"])
    batch = _batch(tok, TEXTS)
    assert (batch["attention_mask"] == 0).any()  # the batch really has padding
    with torch.inference_mode():
        expected = lib(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).logits
        got = ours(batch["input_ids"], batch["attention_mask"])
    torch.testing.assert_close(got, expected, atol=1e-5, rtol=0)


def test_first_pooling_through_pooler_matches_bert_for_sequence_classification(toy_paths):
    # Reference: transformers' BertForSequenceClassification = classifier(dropout(pooler(hidden[:, 0]))).
    lib = BertForSequenceClassification.from_pretrained(toy_paths["encoder"], num_labels=4).eval()
    tok = AutoTokenizer.from_pretrained(toy_paths["encoder"])
    bert = copy.deepcopy(lib.bert)
    pooler, bert.pooler = bert.pooler, None  # as the head method does: the pooler moves into the pooling module
    head = ClassifierHead(lib.config.hidden_size, 4, dropout=0.1, seed=0)
    head.linear.load_state_dict(lib.classifier.state_dict())
    ours = HeadModel(bert, FirstPooling(pooler), head, "encoder").eval()
    batch = _batch(tok, TEXTS)
    with torch.inference_mode():
        expected = lib(**batch).logits
        got = ours(batch["input_ids"], batch["attention_mask"])
    torch.testing.assert_close(got, expected, atol=1e-5, rtol=0)


@pytest.mark.parametrize("name", sorted(POOLINGS))
def test_every_pooling_gives_the_same_logits_for_left_and_right_padding(toy_paths, name):
    # Driven by the registry: a new pooling is checked the day it is added. Position ids come from the mask.
    tok = AutoTokenizer.from_pretrained(toy_paths["decoder"])
    lib, ours = _gpt2_pair(toy_paths["decoder"])
    ours.pooling = build_pooling(name)
    right, left = _batch(tok, TEXTS, "right"), _batch(tok, TEXTS, "left")
    assert not torch.equal(right["input_ids"], left["input_ids"])
    with torch.inference_mode():
        a = ours(right["input_ids"], right["attention_mask"])
        b = ours(left["input_ids"], left["attention_mask"])
    torch.testing.assert_close(a, b, atol=1e-5, rtol=0)


def test_text_ending_in_eos_is_pooled_at_that_token(toy_paths):
    tok = AutoTokenizer.from_pretrained(toy_paths["decoder"])
    ids = [tok("lost my phone")["input_ids"] + [tok.eos_token_id], tok("hello")["input_ids"]]
    batch = pad_batch(ids, tok.eos_token_id)  # worst case: a tokenizer that pads with eos
    hidden = torch.arange(batch["input_ids"].shape[1], dtype=torch.float32).repeat(2, 1).unsqueeze(-1)  # (2, seq, 1)
    pooled = LastPooling()(hidden, batch["attention_mask"])
    assert pooled[:, 0].tolist() == [len(ids[0]) - 1, len(ids[1]) - 1]  # the eos position, the last real token
    # The id-based rule of the library's classes (rightmost token != pad id) would stop one token early here.
    non_pad = (batch["input_ids"] != tok.eos_token_id).int()
    library_rule = (torch.arange(non_pad.shape[1]) * non_pad).argmax(-1)
    assert library_rule[0].item() == len(ids[0]) - 2


def test_position_ids_from_mask_start_at_zero_on_the_first_real_token():
    mask = torch.tensor([[0, 0, 1, 1, 1], [1, 1, 1, 0, 0]])
    assert position_ids_from_mask(mask).tolist() == [[0, 0, 0, 1, 2], [0, 1, 2, 2, 2]]


def test_mean_pooling_ignores_padding_even_when_pad_rows_are_nan():
    hidden = torch.tensor([[[1.0, 2.0], [3.0, 4.0], [float("nan"), float("nan")]]])  # (1, 3, 2)
    mask = torch.tensor([[1, 1, 0]])
    assert build_pooling("mean")(hidden, mask).tolist() == [[2.0, 3.0]]


def test_unknown_pooling_lists_the_valid_ones():
    with pytest.raises(HarnessError, match="first, last, mean"):
        build_pooling("max")
    with pytest.raises(HarnessError, match="use_pooler"):
        build_pooling("mean", pooler=torch.nn.Identity())


def test_auto_pooling_is_first_for_encoders_and_last_for_decoders():
    assert resolve_pooling("auto", "encoder") == "first"
    assert resolve_pooling("auto", "decoder") == "last"
    assert resolve_pooling("mean", "encoder") == "mean"


def test_head_parameter_count_is_d_times_k_plus_k(toy_paths):
    # Common practice: a fresh linear classifier on D features for K classes has D*K weights + K
    # biases, the shape of BertForSequenceClassification's `classifier` (transformers). The head
    # method uses it for every family (GPT-2's own `score` layer has no bias: D*K).
    d, k = 64, 5
    enc = ClassifierHead(d, k, dropout=0.1, seed=1)
    assert sum(p.numel() for p in enc.parameters()) == d * k + k
    assert enc.linear.weight.shape == (k, d)
    bert = BertForSequenceClassification.from_pretrained(toy_paths["encoder"], num_labels=k)
    assert sum(p.numel() for p in enc.parameters()) == sum(p.numel() for p in bert.classifier.parameters())
    gpt2 = GPT2ForSequenceClassification.from_pretrained(toy_paths["decoder"], num_labels=k)
    assert sum(p.numel() for p in gpt2.score.parameters()) == d * k  # the library's decoder layer, for contrast


def test_head_init_depends_on_the_seed_only():
    a = ClassifierHead(32, 3, dropout=0.0, seed=7)
    torch.rand(1000)  # other code consuming the global stream must not change the head
    b = ClassifierHead(32, 3, dropout=0.0, seed=7)
    c = ClassifierHead(32, 3, dropout=0.0, seed=8)
    assert torch.equal(a.linear.weight, b.linear.weight)
    assert not torch.equal(a.linear.weight, c.linear.weight)
    # std 0.02 as the library's _init_weights (initializer_range); loose bound on 96 draws (from memory)
    assert 0.01 < a.linear.weight.std().item() < 0.03


def test_balanced_class_weights_match_scikit_learn():
    # Reference: sklearn.utils.class_weight.compute_class_weight("balanced") = n / (K * count_k).
    labels = [0, 0, 0, 0, 1, 1, 2, 0, 1, 2, 2, 2, 2]
    names = ("a", "b", "c")
    ours = class_weights("balanced", labels, names)
    expected = compute_class_weight("balanced", classes=np.array([0, 1, 2]), y=np.array(labels))
    np.testing.assert_allclose(ours.numpy(), expected, rtol=1e-6)
    assert class_weights({"b": 3.0}, labels, names).tolist() == [1.0, 3.0, 1.0]
    with pytest.raises(HarnessError, match="method.class_weights.zz"):
        class_weights({"zz": 2.0}, labels, names)
    with pytest.raises(HarnessError, match="no training rows"):
        class_weights("balanced", [0, 0, 1], names)


@pytest.mark.parametrize("kind", ["encoder", "decoder"])
def test_wider_batches_change_no_logits(toy_paths, kind):
    # Reference: the library's own classifier on the exactly padded batch (BERT pools [CLS] through its
    # pooler, GPT-2 the last non-pad token). Padding a batch wider, as the head collate does for wide
    # batches (harness.methods.head.batch_width), only adds masked positions: the logits must not move.
    tok = AutoTokenizer.from_pretrained(toy_paths[kind])
    ids = [tok(t)["input_ids"] for t in TEXTS]
    longest = max(map(len, ids))
    exact = pad_batch(ids, tok.pad_token_id)
    wide = pad_batch(ids, tok.pad_token_id, width=longest + 5)
    assert exact["input_ids"].shape[1] == longest and wide["input_ids"].shape[1] == longest + 5
    assert pad_batch(ids, tok.pad_token_id, width=2)["input_ids"].shape[1] == longest  # never cuts a row
    if kind == "encoder":
        lib = BertForSequenceClassification.from_pretrained(toy_paths[kind], num_labels=3).eval()
        ours = HeadModel(lib.bert, FirstPooling(lib.bert.pooler), ClassifierHead(lib.config.hidden_size, 3, dropout=0.0,
                                                                                  seed=0), "encoder").eval()
        ours.head.linear.load_state_dict(lib.classifier.state_dict())
    else:
        lib, ours = _gpt2_pair(toy_paths[kind])
    with torch.inference_mode():
        expected = lib(input_ids=exact["input_ids"], attention_mask=exact["attention_mask"]).logits
        got = ours(wide["input_ids"], wide["attention_mask"])
    torch.testing.assert_close(got, expected, atol=1e-5, rtol=0)


def test_batch_width_rounds_only_wide_batches_and_never_passes_the_limit():
    from harness.methods.batches import PAD_MULTIPLE, ROUND_ABOVE, batch_width

    assert batch_width(13, 64) == 13 and batch_width(ROUND_ABOVE, 128) == ROUND_ABOVE  # short batches stay exact
    assert batch_width(ROUND_ABOVE + 1, 128) == -(-(ROUND_ABOVE + 1) // PAD_MULTIPLE) * PAD_MULTIPLE
    assert all(batch_width(n, 128) % PAD_MULTIPLE == 0 for n in range(ROUND_ABOVE + 1, 129))
    assert batch_width(99, 100) == 100 and batch_width(100, 100) == 100  # the limit (max_length) caps it
