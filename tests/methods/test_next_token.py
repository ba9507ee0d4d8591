"""next_token: masked loss, cached rank scoring, encoder-decoder targets, refusals, training (harness/next_token.py)."""

from __future__ import annotations

from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from harness.config import Config, ModelConfig, config_from_dict
from harness.data.task import Split, TaskData, load_task
from harness.errors import HarnessError
from harness.methods.next_token import INFO_FILE, NextTokenMethod
from harness.methods.rank_scoring import (
    IGNORE_INDEX,
    decoder_rank_scores,
    label_log_scores,
    masked_lm_loss,
    seq2seq_rank_scores,
)
from harness.methods.registry import METHODS, build_method
from harness.models.backbones import Backbone, load_backbone
from tests.common import FERRY

TEXTS = ["The 9.15 from the harbour never left.", "lost my bag", "Can I bring a wheelchair on the early boat to "
         "the island, and is there a lift?", "thanks to the crew, lovely trip"]


def make_cfg(checkpoint: Path, *, max_length: int = 128, **method: Any) -> Config:
    return config_from_dict({"task": {"name": "t", "train": "unused.csv"}, "model": {"checkpoint": str(checkpoint)},
                             "method": {"kind": "next_token", **method}, "train": {"max_length": max_length}})


def make_data(label_names: list[str], texts: list[str] | None = None, labels: list[int] | None = None) -> TaskData:
    texts = texts or TEXTS
    labels = labels or [i % len(label_names) for i in range(len(texts))]
    split = Split("train", tuple(f"r{i}" for i in range(len(texts))), tuple(texts), tuple(labels))
    return TaskData(split, split, split, tuple(label_names), False)


def backbone(path: Path) -> Backbone:
    b = load_backbone(ModelConfig(checkpoint=str(path)), for_lm=True)
    b.model.eval()  # no dropout: every comparison below is deterministic
    return b


def words_of_length(tok: Any, n_tokens: int, count: int) -> list[str]:
    """`count` words that the toy tokenizer spells with `n_tokens` tokens after a space (vocab-independent test)."""
    pool = ["refund", "late", "help", "thanks", "left", "sailing", "money", "back", "lost", "crew", "ramp",
            "found", "step", "wheelchair", "schedule", "praise", "timetable", "accessibility", "item", "great"]
    out = [w for w in pool if len(tok.encode(" " + w, add_special_tokens=False)) == n_tokens][:count]
    assert len(out) == count, f"the toy vocabulary has too few {n_tokens}-token words"
    return out


@pytest.fixture(scope="module")
def dec(toy_paths: dict[str, Path]) -> Backbone:
    return backbone(toy_paths["decoder"])


@pytest.fixture(scope="module")
def t5(toy_paths: dict[str, Path]) -> Backbone:
    return backbone(toy_paths["encoder-decoder"])


def test_registered() -> None:
    assert METHODS["next_token"] is NextTokenMethod and "prompt" in METHODS


def test_masked_loss_equals_hand_cross_entropy_over_label_words(toy_paths: dict[str, Path], dec: Backbone) -> None:
    names = ["lost_item", "refund", "accessibility", "praise"]  # multi-token label words in the toy vocabulary
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"]), data=make_data(names), backbone=dec)
    items = m.encode(TEXTS, [0, 1, 2, 3])
    batch = m.collate(items)
    ours = m.loss(batch)
    logits = dec.model(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).logits
    # By hand (torch cross_entropy docs; causal LMs predict token t+1 at position t, common practice): only the
    # label-word positions of each example, each predicted from the position before it.
    rows, gold = [], []
    for i, it in enumerate(items):
        for j in range(it.extra["prompt_len"], len(it)):
            rows.append(logits[i, j - 1])
            gold.append(it.input_ids[j])
    hand = F.cross_entropy(torch.stack(rows), torch.tensor(gold))
    assert torch.allclose(ours, hand, atol=1e-5)
    # The library's own shifted causal-LM loss with the same ignore-index targets (GPT2LMHeadModel labels=...).
    lib = dec.model(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"],
                    labels=batch["target_ids"]).loss
    assert torch.allclose(ours, lib, atol=1e-5)
    assert len(gold) == sum(len(m.labels.ids[y][0]) for y in [0, 1, 2, 3])


def test_label_positions_only_loss_and_gradients_equal_the_full_output_layer(toy_paths: dict[str, Path]) -> None:
    # The output layer run on the label-word positions only (a boolean `logits_to_keep`, which transformers'
    # decoders take) must give the loss and gradients of the full (batch, seq, vocab) logits.
    fresh = backbone(toy_paths["decoder"])
    names = ["lost_item", "refund", "accessibility", "praise"]
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"]), data=make_data(names), backbone=fresh)
    assert m._keeps_positions  # GPT-2's forward takes logits_to_keep: the short path is the one under test
    batch = m.collate(m.encode(TEXTS, [0, 1, 2, 3]))
    results = []
    for keeps in (True, False):
        m._keeps_positions = keeps
        fresh.model.zero_grad()
        loss = m.loss(batch)
        loss.backward()
        results.append((loss.detach(), [p.grad.clone() for p in fresh.model.parameters() if p.grad is not None]))
    (short, short_grads), (full, full_grads) = results
    assert torch.allclose(short, full, atol=1e-6)
    assert len(short_grads) == len(full_grads) > 0
    assert all(torch.allclose(a, b, atol=1e-6) for a, b in zip(short_grads, full_grads, strict=True))


def test_masked_loss_ignores_what_the_prompt_positions_predict(toy_paths: dict[str, Path], dec: Backbone) -> None:
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"]), data=make_data(["lost_item", "refund"]),
                     backbone=dec)
    items = m.encode(TEXTS[:2], [0, 1])
    batch = m.collate(items)
    logits = dec.model(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).logits.detach()
    base = masked_lm_loss(logits, batch["target_ids"])
    noisy = logits.clone()
    gen = torch.Generator().manual_seed(0)
    for i, it in enumerate(items):
        p = it.extra["prompt_len"]
        noisy[i, : p - 1] += 5 * torch.randn(noisy[i, : p - 1].shape, generator=gen)  # predictions of prompt tokens
        noisy[i, len(it):] += 5 * torch.randn(noisy[i, len(it):].shape, generator=gen)  # padding
    assert torch.equal(masked_lm_loss(noisy, batch["target_ids"]), base)
    # ... while the position that predicts the first label token does count (so this test can fail).
    p0 = items[0].extra["prompt_len"]
    noisy[0, p0 - 1] += 5 * torch.randn(noisy.shape[-1], generator=gen)
    assert not torch.allclose(masked_lm_loss(noisy, batch["target_ids"]), base)
    assert (batch["target_ids"][0, :p0] == IGNORE_INDEX).all()


def full_pass_decoder(model: Any, prompt: tuple[int, ...], seq: tuple[int, ...]) -> float:
    """Reference: one forward pass over prompt + sequence, no cache, no padding."""
    with torch.no_grad():
        logp = model(input_ids=torch.tensor([prompt + seq]), use_cache=False).logits[0].log_softmax(-1)
    return sum(float(logp[len(prompt) - 1 + j, tok]) for j, tok in enumerate(seq))


@pytest.mark.parametrize("shape", ["single", "multi"])
def test_cached_decoder_scores_equal_full_passes(toy_paths: dict[str, Path], dec: Backbone, shape: str) -> None:
    tok = dec.tokenizer
    words = words_of_length(tok, 1, 3) if shape == "single" else [
        *words_of_length(tok, 2, 1), *words_of_length(tok, 3, 1), *words_of_length(tok, 4, 1), "lost it again"]
    names = [f"l{i}" for i in range(len(words))]
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"], label_words=dict(zip(names, words, strict=True))),
                     data=make_data(names), backbone=dec)
    prompts = [it.input_ids[: it.extra["prompt_len"]] for it in m.encode(TEXTS, [-1] * len(TEXTS))]
    assert len({len(p) for p in prompts}) >= 3  # different lengths: left padding is exercised
    calls = []
    hook = dec.model.register_forward_hook(lambda *_: calls.append(1))
    try:
        got = decoder_rank_scores(dec.model, prompts, m.seqs, m.pad_id)
    finally:
        hook.remove()
    assert len(calls) == (1 if shape == "single" else 2)  # prompt pass (+ one pass for all continuations)
    ref = torch.tensor([[full_pass_decoder(dec.model, p, s) for s in m.seqs] for p in prompts])
    assert torch.allclose(got, ref, atol=1e-4)


def test_cached_seq2seq_scores_equal_full_passes(toy_paths: dict[str, Path], t5: Backbone) -> None:
    names = ["lost_item", "refund", "l2"]
    m = build_method("next_token", cfg=make_cfg(toy_paths["encoder-decoder"], label_words={
        "lost_item": "lost item", "refund": "refund", "l2": "the crew were kind"}),
                     data=make_data(names), backbone=t5)
    assert all(ids[0][-1] == t5.tokenizer.eos_token_id for ids in m.labels.ids)  # targets close with </s>
    prompts = [it.input_ids for it in m.encode(TEXTS, [-1] * len(TEXTS))]
    calls = []
    hook = t5.model.get_encoder().register_forward_hook(lambda *_: calls.append(1))
    try:
        got = seq2seq_rank_scores(t5.model, prompts, m.seqs, m.pad_id, t5.model.config.decoder_start_token_id)
    finally:
        hook.remove()
    assert len(calls) == 1  # the encoder ran once for all prompts and labels
    ref = torch.empty_like(got)
    with torch.no_grad():
        for i, p in enumerate(prompts):
            for j, s in enumerate(m.seqs):
                # Reference: T5ForConditionalGeneration's own teacher forcing (labels shifted right internally).
                logp = t5.model(input_ids=torch.tensor([p]), labels=torch.tensor([s])).logits[0].log_softmax(-1)
                ref[i, j] = sum(logp[k, t] for k, t in enumerate(s))
    assert torch.allclose(got, ref, atol=1e-4)


def test_seq2seq_loss_is_teacher_forced_cross_entropy(toy_paths: dict[str, Path], t5: Backbone) -> None:
    m = build_method("next_token", cfg=make_cfg(toy_paths["encoder-decoder"]), data=make_data(["lost_item", "refund"]),
                     backbone=t5)
    items = m.encode(TEXTS[:2], [0, 1])
    batch = m.collate(items)
    rows, gold = [], []
    start = t5.model.config.decoder_start_token_id
    for it in items:  # by hand: decoder input = start + target[:-1] (T5 paper / library convention)
        target = it.extra["target"]
        logits = t5.model(input_ids=torch.tensor([it.input_ids]),
                          decoder_input_ids=torch.tensor([(start, *target[:-1])])).logits[0]
        rows.extend(logits)
        gold.extend(target)
    hand = F.cross_entropy(torch.stack(rows), torch.tensor(gold))
    assert torch.allclose(m.loss(batch), hand, atol=1e-5)


def test_length_normalisation_on_a_constructed_case() -> None:
    # Label 0 has one token with log-prob -1.0; label 1 has three tokens of -0.6 each (sum -1.8, mean -0.6).
    # Summing penalises the longer label for its length alone; the per-token mean prefers it.
    raw = torch.tensor([[-1.0, -1.8]])
    summed = label_log_scores(raw, [1, 3], [0, 1], 2, "sum")
    mean = label_log_scores(raw, [1, 3], [0, 1], 2, "mean")
    assert torch.allclose(summed, torch.tensor([[-1.0, -1.8]])) and summed.argmax() == 0
    assert torch.allclose(mean, torch.tensor([[-1.0, -0.6]])) and mean.argmax() == 1


def test_several_words_average_their_probabilities() -> None:
    # Worked by hand: label 0 = words with p = e^-1 and e^-2 -> log((e^-1 + e^-2) / 2) = -1.3799 (to 4 places).
    raw = torch.tensor([[-1.0, -2.0, -0.5]], dtype=torch.float64)
    got = label_log_scores(raw, [1, 1, 1], [0, 0, 1], 2)
    assert got[0, 0].item() == pytest.approx(np.log((np.exp(-1) + np.exp(-2)) / 2)) == pytest.approx(-1.3799, abs=1e-4)
    assert got[0, 1].item() == pytest.approx(-0.5)


@pytest.mark.parametrize("score", ["sum", "mean"])
def test_predict_proba_is_a_softmax_over_full_pass_scores(toy_paths: dict[str, Path], dec: Backbone, score: str) -> None:
    names = ["lost_item", "refund", "accessibility"]
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"], score=score), data=make_data(names), backbone=dec)
    items = m.encode(TEXTS, [0, 1, 2, 0])
    probs = m.predict_proba(items, batch_size=3)
    assert probs.shape == (4, 3) and np.allclose(probs.sum(1), 1)
    ref = torch.tensor([[full_pass_decoder(dec.model, it.input_ids[: it.extra["prompt_len"]], s) / (len(s) if score == "mean" else 1)
                         for s in m.seqs] for it in items], dtype=torch.float64)
    assert np.allclose(probs, ref.softmax(-1).numpy(), atol=1e-4)
    assert np.allclose(m.predict_proba(items[::-1], batch_size=2), probs[::-1], atol=1e-5)  # order kept


def test_recorded_ids_match_the_tokenizers_encoding_of_the_rendered_text(toy_paths: dict[str, Path], dec: Backbone) -> None:
    names = ["lost_item", "refund"]
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"], end_token=True), data=make_data(names), backbone=dec)
    described = m.describe()["label_words"]
    tok = dec.tokenizer
    for y, name in enumerate(names):
        (item,) = m.encode([TEXTS[0]], [y])
        rendered = f"Message: {TEXTS[0]}\nCategory: {name.replace('_', ' ')}"  # the default template, space added
        assert list(item.input_ids) == tok.encode(rendered, add_special_tokens=False) + [tok.eos_token_id]
        assert described[name][0]["token_ids"] == list(item.input_ids[item.extra["prompt_len"]:])


def test_truncation_keeps_template_tail_and_label_words(toy_paths: dict[str, Path], dec: Backbone) -> None:
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"], max_length=24),
                     data=make_data(["lost_item", "refund"]), backbone=dec)
    (item,) = m.encode([" ".join(TEXTS * 3)], [0])
    assert len(item) <= 24
    decoded = dec.tokenizer.decode(list(item.input_ids))
    assert decoded.startswith("Message: The 9.15") and decoded.endswith("\nCategory: lost item")
    assert len(decoded) < len(" ".join(TEXTS * 3))  # the text was cut, not the template or the label words


def test_training_lowers_label_loss_and_beats_majority(toy_paths: dict[str, Path], tmp_path: Path) -> None:
    from harness.train.loop import train

    data = load_task(config_from_dict({"task": {"name": "ferry", "train": str(FERRY / "train.csv"),
                                                "dev": str(FERRY / "dev.csv"), "test": str(FERRY / "test.csv")},
                                       "model": {"checkpoint": "-"}}).task)
    # Single-token cue words: a randomly initialised toy learns one next token per class within a few epochs.
    cue = {"schedule": "sailing", "refund": "refund", "accessibility": "help", "lost_item": "left", "praise": "thanks"}
    cfg = config_from_dict({
        "task": {"name": "t", "train": "-"}, "model": {"checkpoint": str(toy_paths["decoder"])},
        "method": {"kind": "next_token", "label_words": {k: cue[k] for k in data.label_names}},
        # One thread: the two cores are shared, and two contending threads are slower than one.
        "train": {"max_length": 48, "epochs": 6, "learning_rate": 1e-3, "threads": 1, "seed": 13}})
    before_threads = torch.get_num_threads()
    m = build_method("next_token", cfg=cfg, data=data)  # loads fresh toy weights through harness.models.backbones
    train_items, dev = m.encode(data.train.texts, data.train.labels), m.encode(data.dev.texts, data.dev.labels)

    def dev_loss() -> float:
        m.model.eval()
        with torch.no_grad():
            return m.loss(m.collate(dev)).item()

    before = dev_loss()
    try:
        train(m, train_items, dev, data.label_names, cfg, tmp_path)  # the project's own loop, as for `head`
    finally:
        torch.set_num_threads(before_threads)
    assert dev_loss() < before - 1.0
    pred = m.predict_proba(dev, 64).argmax(1)
    majority = Counter(data.train.labels).most_common(1)[0][0]
    base = float(np.mean(np.array(data.dev.labels) == majority))  # the majority-class baseline, common practice
    assert float(np.mean(pred == np.array(data.dev.labels))) > base + 0.1


def test_encoder_checkpoint_is_refused(toy_paths: dict[str, Path]) -> None:
    bare = load_backbone(ModelConfig(checkpoint=str(toy_paths["encoder"])), for_lm=False)
    with pytest.raises(HarnessError, match=r"encoder-only checkpoint; it has no next-token output layer.*method\.kind: head"):
        build_method("next_token", cfg=make_cfg(toy_paths["encoder"]), data=make_data(["a", "b"]), backbone=bare)
    with pytest.raises(HarnessError, match=r"method\.kind: head"):  # loading by config refuses as well
        build_method("next_token", cfg=make_cfg(toy_paths["encoder"]), data=make_data(["a", "b"]))


@pytest.mark.parametrize("template", ["{text.__class__}", "{text[0]}", "{other}", "{text!r}"])
def test_template_injection_is_a_config_error(toy_paths: dict[str, Path], dec: Backbone, template: str) -> None:
    with pytest.raises(HarnessError, match=r"method\.template'? in .*: placeholder .* is not allowed"):
        build_method("next_token", cfg=make_cfg(toy_paths["decoder"], template=f"Message: {template}\nCategory:"),
                     data=make_data(["a", "b"]), backbone=dec)


def test_config_errors_name_their_key(toy_paths: dict[str, Path], dec: Backbone) -> None:
    path, data = toy_paths["decoder"], make_data(["lost_item", "refund"])
    cases = [({"label_words": {"lost_item": "lost"}}, r"method\.label_words: label 'refund' has no words"),
             ({"label_words": {"lost_item": "lost", "refund": "money", "praise": "x"}}, r"method\.label_words\.praise"),
             ({"label_words": {"lost_item": "late", "refund": " late"}}, "same tokens"),
             ({"template": "{demos}Category:"}, r"method\.template'? in .*: the template has no \{text\}"),
             ({"template": "Read this. " * 30 + "{text}:"}, r"method\.template: the template alone takes"),
             ({"freeze": "backbone"}, r"method\.freeze")]
    for method, pattern in cases:
        with pytest.raises(HarnessError, match=pattern):
            build_method("next_token", cfg=make_cfg(path, max_length=32, **method), data=data, backbone=dec)


def test_lora_trains_only_adapters_and_scores_through_them(toy_paths: dict[str, Path]) -> None:
    fresh = backbone(toy_paths["decoder"])
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"], lora={"r": 4}), data=make_data(["lost_item", "refund"]),
                     backbone=fresh)
    names = [n for n, _ in m.trainable_parameters()]
    assert names and all("lora_" in n for n in names)
    with torch.no_grad():  # make the adapters matter: peft starts lora_B at zero
        for _, p in m.trainable_parameters():
            p.add_(0.05)
    prompts = [it.input_ids[: it.extra["prompt_len"]] for it in m.encode(TEXTS, [-1] * 4)]
    m.lm.eval()
    got = decoder_rank_scores(m.lm, prompts, m.seqs, m.pad_id)
    ref = torch.tensor([[full_pass_decoder(m.lm, p, s) for s in m.seqs] for p in prompts])
    assert torch.allclose(got, ref, atol=1e-4)


def test_save_and_reload_for_prediction(toy_paths: dict[str, Path], tmp_path: Path) -> None:
    import json

    from transformers import AutoModelForCausalLM

    fresh = backbone(toy_paths["decoder"])
    m = build_method("next_token", cfg=make_cfg(toy_paths["decoder"], lora={"r": 4}),
                     data=make_data(["lost_item", "refund"]), backbone=fresh)
    with torch.no_grad():
        for _, p in m.trainable_parameters():
            p.add_(0.05)  # adapters that change the outputs, so merging them is tested
    items = m.encode(TEXTS, [-1] * 4)
    expected = m.predict_proba(items, 4)
    m.save(tmp_path / "model")
    # A plain checkpoint (adapters merged): the library's own class reads it and gives the adapted logits.
    again = AutoModelForCausalLM.from_pretrained(tmp_path / "model").eval()
    ids = torch.tensor([items[0].input_ids])
    with torch.no_grad():
        assert torch.allclose(again(input_ids=ids).logits, m.lm(input_ids=ids).logits, atol=1e-5)
    saved = json.loads((tmp_path / "model" / INFO_FILE).read_text())
    assert saved["label_words"]["refund"][0]["token_ids"] == list(m.labels.ids[1][0])
    exported = NextTokenMethod.load_exported(tmp_path / "model")
    assert exported.label_names == ("lost_item", "refund")
    assert np.allclose(exported.predict_proba(TEXTS), expected, atol=1e-5)


@pytest.mark.parametrize("kind", ["decoder", "encoder-decoder"])
def test_next_token_run_through_the_runner(toy_paths: dict[str, Path], tmp_path: Path, kind: str) -> None:
    import csv
    import json

    from harness.runs.predict import predict
    from harness.runs.run import execute_run

    for split in ("train", "dev", "test"):
        with open(tmp_path / f"{split}.csv", "w", newline="", encoding="utf-8") as fh:
            writer = csv.writer(fh)
            writer.writerow(["text", "label"])
            writer.writerows([t, ["lost_item", "refund"][i % 2]] for i, t in enumerate(TEXTS))
    cfg = config_from_dict({
        "task": {"name": "t", **{s: str(tmp_path / f"{s}.csv") for s in ("train", "dev", "test")}},
        "model": {"checkpoint": str(toy_paths[kind])}, "output": str(tmp_path / "runs"),
        "method": {"kind": "next_token"}, "train": {"threads": 1, "max_steps": 2, "batch_size": 2},
        "eval": {"bootstrap": 0}})
    threads = torch.get_num_threads()
    try:
        folder = execute_run(cfg, log=lambda _: None)
    finally:
        torch.set_num_threads(threads)
    described = json.loads((folder / "method.json").read_text())
    assert described["kind"] == "next_token" and described["family"] == kind
    first = json.loads((folder / "predictions.jsonl").read_text().splitlines()[0])
    with open(predict(folder, tmp_path / "test.csv", tmp_path / "out.csv"), encoding="utf-8") as fh:
        row = next(csv.DictReader(fh))
    # The reloaded, trained model gives the run's own test probabilities.
    assert np.allclose([float(row[f"prob_{n}"]) for n in ("lost_item", "refund")],
                       [first["probs"][n] for n in ("lost_item", "refund")], atol=1e-5)
