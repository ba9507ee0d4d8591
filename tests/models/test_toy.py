"""Toy checkpoints: they load through the transformers auto classes and behave like their full-size kin.

The reference throughout is the transformers library's own model and tokenizer classes: a toy is right
when those classes load it and give the output shapes their documented outputs have.
"""

from __future__ import annotations

import re
import threading
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file
from transformers import (
    AutoConfig,
    AutoModel,
    AutoModelForCausalLM,
    AutoModelForSeq2SeqLM,
    AutoModelForSequenceClassification,
    AutoTokenizer,
    BertForSequenceClassification,
    BertModel,
    GPT2ForSequenceClassification,
    GPT2LMHeadModel,
    T5ForConditionalGeneration,
)

import harness.models.toy as toy
from harness.errors import HarnessError
from harness.models.toy import TOY_KINDS, build_toy, ensure_toy, sample_texts, toy_main

SENTENCE = "The baker fixed the blue kettle this morning."  # one of the built-in training sentences
BATCH = ["A neighbour returned the library books after the storm.", "My aunt forgot the gate."]


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> list[str]:
    """The built-in sentences (a root without sample_tasks/ falls back to them): fixed, whatever the repo holds."""
    return sample_texts(tmp_path_factory.mktemp("empty-root"))


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory, corpus: list[str]) -> dict[str, Path]:
    out = tmp_path_factory.mktemp("toys")
    return {kind: build_toy(kind, out / kind, texts=corpus, seed=0) for kind in TOY_KINDS}


def test_fallback_corpus_is_about_two_hundred_distinct_sentences(corpus: list[str]) -> None:
    assert 150 <= len(set(corpus)) <= 250
    assert SENTENCE in corpus


def test_sample_texts_reads_text_question_and_reply_columns(tmp_path: Path) -> None:
    (tmp_path / "sample_tasks" / "a").mkdir(parents=True)
    (tmp_path / "sample_tasks" / "b").mkdir()
    (tmp_path / "sample_tasks" / "a" / "train.csv").write_text(
        "text,label\nfirst one,x\n  ,y\n", encoding="utf-8"
    )
    (tmp_path / "sample_tasks" / "b" / "dev.csv").write_text(
        "question,reply,label\nwhy?,because.,1\n", encoding="utf-8"
    )
    assert sample_texts(tmp_path) == ["first one", "why?", "because."]


def test_sample_texts_names_an_unreadable_file(tmp_path: Path) -> None:
    bad = tmp_path / "sample_tasks" / "a" / "train.csv"
    bad.parent.mkdir(parents=True)
    bad.write_bytes(b"text\n\xff\xfe broken\n")
    with pytest.raises(HarnessError, match=re.escape(str(bad))):
        sample_texts(tmp_path)


@pytest.mark.parametrize(
    "call", [lambda p: build_toy("lstm", p, texts=["x"]), lambda p: ensure_toy("lstm", cache_dir=p)]
)
def test_unknown_kind_lists_the_valid_ones(tmp_path: Path, call) -> None:
    with pytest.raises(HarnessError) as info:
        call(tmp_path)
    assert all(kind in str(info.value) for kind in TOY_KINDS)


def test_build_without_text_is_refused(tmp_path: Path) -> None:
    with pytest.raises(HarnessError, match="no non-empty text"):
        build_toy("encoder", tmp_path, texts=["", "  "])


@pytest.mark.parametrize(
    ("kind", "auto_class", "expected_class"),
    [
        ("encoder", AutoModel, BertModel),
        ("decoder", AutoModelForCausalLM, GPT2LMHeadModel),
        ("encoder-decoder", AutoModelForSeq2SeqLM, T5ForConditionalGeneration),
    ],
)
def test_loads_through_auto_classes_and_is_tiny(built, kind, auto_class, expected_class) -> None:
    model = auto_class.from_pretrained(built[kind])
    tokenizer = AutoTokenizer.from_pretrained(built[kind])
    assert isinstance(model, expected_class)
    assert tokenizer.is_fast
    assert (built[kind] / "model.safetensors").is_file()
    assert model.config.vocab_size == len(tokenizer)  # every token id has an embedding row
    assert sum(p.numel() for p in model.parameters()) < 1_000_000
    assert tokenizer.model_max_length == 256


def test_encoder_forward_shapes_include_the_pooler(built) -> None:
    model = AutoModel.from_pretrained(built["encoder"]).eval()
    batch = AutoTokenizer.from_pretrained(built["encoder"])(BATCH, padding=True, return_tensors="pt")
    with torch.no_grad():
        out = model(**batch)
    size, seq = batch["input_ids"].shape
    hidden = model.config.hidden_size
    assert out.last_hidden_state.shape == (size, seq, hidden)  # (batch, seq, hidden)
    assert out.pooler_output.shape == (size, hidden)  # (batch, hidden): BertModel's pooler is kept


def test_decoder_forward_shapes(built) -> None:
    model = AutoModelForCausalLM.from_pretrained(built["decoder"]).eval()
    batch = AutoTokenizer.from_pretrained(built["decoder"])(BATCH, padding=True, return_tensors="pt")
    assert set(batch) == {"input_ids", "attention_mask"}  # GPT-2 would embed token_type_ids, so none
    with torch.no_grad():
        out = model(**batch)
    assert out.logits.shape == (*batch["input_ids"].shape, model.config.vocab_size)  # (batch, seq, vocab)


def test_encoder_decoder_forward_shapes_and_t5_conventions(built) -> None:
    model = AutoModelForSeq2SeqLM.from_pretrained(built["encoder-decoder"]).eval()
    tokenizer = AutoTokenizer.from_pretrained(built["encoder-decoder"])
    # T5's ids (from memory of the t5-small tokenizer): <pad>=0, </s>=1, <unk>=2; decoding starts from <pad>.
    assert (tokenizer.pad_token_id, tokenizer.eos_token_id, tokenizer.unk_token_id) == (0, 1, 2)
    assert model.config.decoder_start_token_id == tokenizer.pad_token_id
    batch = tokenizer(BATCH, padding=True, return_tensors="pt")
    labels = tokenizer(["returned", "forgot the gate"], padding=True, return_tensors="pt")["input_ids"]
    with torch.no_grad():
        out = model(**batch, labels=labels)
    assert out.logits.shape == (*labels.shape, model.config.vocab_size)  # (batch, target_seq, vocab)
    assert out.encoder_last_hidden_state.shape == (*batch["input_ids"].shape, model.config.d_model)
    assert torch.isfinite(out.loss)


def test_encoder_tokenizer_behaves_like_bert(built) -> None:
    tokenizer = AutoTokenizer.from_pretrained(built["encoder"])
    # BERT's layout (common practice): [CLS] A [SEP] B [SEP], token_type_ids 0 for A and its [SEP], 1 for B's part.
    assert tokenizer.convert_ids_to_tokens(list(range(5))) == ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]
    pair = tokenizer("Who fixed the kettle?", "The baker.")
    tokens = tokenizer.convert_ids_to_tokens(pair["input_ids"])
    first_sep = tokens.index("[SEP]")
    assert tokens[0] == "[CLS]" and tokens[-1] == "[SEP]" and tokens.count("[SEP]") == 2
    assert pair["token_type_ids"] == [0] * (first_sep + 1) + [1] * (len(tokens) - first_sep - 1)
    assert "baker" in tokens  # lower-cased before lookup


def test_decoder_pads_with_its_own_token_and_adds_nothing(built) -> None:
    tokenizer = AutoTokenizer.from_pretrained(built["decoder"])
    config = AutoConfig.from_pretrained(built["decoder"])
    assert tokenizer.eos_token == tokenizer.bos_token == "<|endoftext|>"
    assert tokenizer.pad_token == "<pad>" and tokenizer.pad_token_id != tokenizer.eos_token_id
    assert config.pad_token_id == tokenizer.pad_token_id and config.eos_token_id == tokenizer.eos_token_id
    ids = tokenizer(SENTENCE)["input_ids"]
    assert tokenizer.eos_token_id not in ids and tokenizer.pad_token_id not in ids
    # Byte-level BPE without a prefix space (GPT-2, from memory): "The" at the start has no "Ġ" marker.
    assert tokenizer.convert_ids_to_tokens(ids)[0].startswith("T")


@pytest.mark.parametrize(
    ("kind", "head"), [("encoder", BertForSequenceClassification), ("decoder", GPT2ForSequenceClassification)]
)
def test_sequence_classification_ignores_padding(built, kind, head) -> None:
    model = AutoModelForSequenceClassification.from_pretrained(built[kind], num_labels=3).eval()
    tokenizer = AutoTokenizer.from_pretrained(built[kind])
    assert isinstance(model, head)
    padded = tokenizer(BATCH, padding=True, return_tensors="pt")
    alone = tokenizer(BATCH[1:], return_tensors="pt")
    assert padded["input_ids"].shape[1] > alone["input_ids"].shape[1]  # the second row really is padded
    with torch.no_grad():
        logits = model(**padded).logits
        single = model(**alone).logits
    assert logits.shape == (2, 3)  # (batch, num_labels)
    # GPT2ForSequenceClassification scores the last token that is not config.pad_token_id (transformers'
    # modeling_gpt2), so a padded row must score like the same row unpadded; BERT masks padding out.
    torch.testing.assert_close(logits[1], single[0], atol=1e-5, rtol=1e-4)


@pytest.mark.parametrize("kind", TOY_KINDS)
def test_tokenizer_round_trips_a_sentence(built, kind) -> None:
    tokenizer = AutoTokenizer.from_pretrained(built[kind])
    ids = tokenizer(SENTENCE)["input_ids"]
    assert tokenizer.unk_token_id not in ids
    expected = SENTENCE.lower() if kind == "encoder" else SENTENCE  # the BERT-style one lower-cases
    assert tokenizer.decode(ids, skip_special_tokens=True) == expected


def _tensors(folder: Path) -> dict[str, torch.Tensor]:
    return load_file(folder / "model.safetensors")


@pytest.mark.parametrize("kind", TOY_KINDS)
def test_rebuild_is_deterministic_and_seed_matters(tmp_path: Path, corpus, kind) -> None:
    first = build_toy(kind, tmp_path / "a", texts=corpus, seed=0)
    again = build_toy(kind, tmp_path / "b", texts=corpus, seed=0)
    other = build_toy(kind, tmp_path / "c", texts=corpus, seed=1)
    a, b, c = _tensors(first), _tensors(again), _tensors(other)
    assert a.keys() == b.keys() == c.keys()
    assert all(torch.equal(a[name], b[name]) for name in a)
    assert any(not torch.equal(a[name], c[name]) for name in a)
    for name in ("tokenizer.json", "tokenizer_config.json", "config.json"):
        assert (first / name).read_bytes() == (again / name).read_bytes() == (other / name).read_bytes()


def test_building_leaves_the_callers_random_stream_alone(tmp_path: Path, corpus) -> None:
    torch.manual_seed(123)
    expected = torch.rand(3)
    torch.manual_seed(123)
    build_toy("encoder", tmp_path, texts=corpus, seed=7)
    assert torch.equal(torch.rand(3), expected)


def test_ensure_toy_caches_under_harness_cache(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setenv("HARNESS_CACHE", str(tmp_path))
    path = ensure_toy("decoder", seed=3)
    assert path.parent == tmp_path / "toy"
    assert re.fullmatch(r"decoder-s3-[0-9a-f]{12}", path.name)
    assert AutoModelForCausalLM.from_pretrained(path).config.n_layer == 2

    def refuse(*args, **kwargs):
        raise AssertionError("rebuilt although cached")

    monkeypatch.setattr(toy, "build_toy", refuse)
    assert ensure_toy("decoder", seed=3) == path
    assert sorted(p.name for p in (tmp_path / "toy").iterdir()) == [path.name]  # no temporary left behind


def test_ensure_toy_separates_seeds(tmp_path: Path) -> None:
    assert ensure_toy("encoder", seed=0, cache_dir=tmp_path) != ensure_toy(
        "encoder", seed=1, cache_dir=tmp_path
    )


def test_interrupted_build_leaves_nothing(tmp_path: Path, monkeypatch) -> None:
    real = toy.build_toy

    def crash(kind, out_dir, **kwargs):
        real(kind, out_dir, **kwargs)
        (out_dir / "model.safetensors").write_bytes(b"half")
        raise KeyboardInterrupt

    monkeypatch.setattr(toy, "build_toy", crash)
    with pytest.raises(KeyboardInterrupt):
        ensure_toy("encoder-decoder", cache_dir=tmp_path)
    assert list((tmp_path / "toy").iterdir()) == []


def test_concurrent_builds_agree_on_one_complete_folder(tmp_path: Path, monkeypatch) -> None:
    real = toy.build_toy
    both_built = threading.Barrier(2, timeout=60)

    def build_then_wait(*args, **kwargs):
        out = real(*args, **kwargs)
        both_built.wait()  # make both threads reach the rename, the race under test
        return out

    monkeypatch.setattr(toy, "build_toy", build_then_wait)
    results: list[Path] = []
    threads = [
        threading.Thread(target=lambda: results.append(ensure_toy("encoder", cache_dir=tmp_path)))
        for _ in range(2)
    ]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert len(results) == 2 and results[0] == results[1]
    assert [p.name for p in (tmp_path / "toy").iterdir()] == [results[0].name]
    assert AutoModel.from_pretrained(results[0]).config.num_hidden_layers == 2


def test_toy_main_builds_every_kind(tmp_path: Path) -> None:
    paths = toy_main(tmp_path, seed=0)
    assert [p.name for p in paths] == list(TOY_KINDS)
    assert all((p / "model.safetensors").is_file() and (p / "tokenizer.json").is_file() for p in paths)


@pytest.mark.parametrize("kind", TOY_KINDS)
def test_session_toys_cover_every_sample_text(toy_paths, kind) -> None:
    """The toys built from the repository's texts know every character in them."""
    assert sorted(toy_paths) == sorted(TOY_KINDS)
    tokenizer = AutoTokenizer.from_pretrained(toy_paths[kind])
    texts = sample_texts()
    decoded = tokenizer.batch_decode(tokenizer(texts)["input_ids"], skip_special_tokens=True)
    if kind == "encoder":
        # BERT-style decoding spaces out punctuation ("we ' re", as bert-base-uncased does; from memory),
        # so compare without spaces; lower-casing also strips accents, as BERT's normalizer does.
        strip = tokenizer.backend_tokenizer.normalizer.normalize_str
        assert [d.replace(" ", "") for d in decoded] == [strip(t).replace(" ", "") for t in texts]
    else:
        assert decoded == texts
