"""Checkpoint loading: sources, family detection, pickle refusal, padding fixes, length clamping."""

from __future__ import annotations

import json
import logging
import shutil

import pytest
import torch
from safetensors.torch import load_file
from transformers import BertConfig, GPT2Config, LlamaConfig, RobertaConfig, T5Config

from harness.config import ModelConfig
from harness.errors import HarnessError
from harness.models.backbones import PAD_TOKEN, clamp_max_length, detect_family, load_backbone, position_limit


@pytest.mark.parametrize("config, family", [
    # Families as the library's own config classes describe them (is_encoder_decoder, model_type).
    (BertConfig(), "encoder"),
    (RobertaConfig(), "encoder"),
    (GPT2Config(), "decoder"),
    (LlamaConfig(), "decoder"),
    (T5Config(), "encoder-decoder"),
])
def test_family_detected_from_the_config(config, family):
    assert detect_family(config) == family


@pytest.mark.parametrize("kind", ["encoder", "decoder", "encoder-decoder"])
def test_toy_checkpoints_load_with_their_family(kind):
    backbone = load_backbone(ModelConfig(checkpoint=f"toy:{kind}"), for_lm=False)
    assert backbone.family == kind
    assert backbone.tokenizer.padding_side == "right"
    assert backbone.tokenizer.pad_token_id is not None
    assert backbone.model.config.pad_token_id == backbone.tokenizer.pad_token_id
    # A head reads hidden states: the bare model (encoder stack only for T5), never an LM output layer.
    assert not hasattr(backbone.model, "lm_head")


def test_for_lm_keeps_the_language_model_layer_and_refuses_encoders():
    assert hasattr(load_backbone(ModelConfig(checkpoint="toy:decoder"), for_lm=True).model, "lm_head")
    with pytest.raises(HarnessError, match="encoder"):
        load_backbone(ModelConfig(checkpoint="toy:encoder"), for_lm=True)


def test_family_override_wins(toy_paths):
    backbone = load_backbone(ModelConfig(checkpoint=str(toy_paths["decoder"]), family="decoder"), for_lm=False)
    assert backbone.family == "decoder"
    with pytest.raises(HarnessError):  # a wrong override is a clear error, not a crash
        load_backbone(ModelConfig(checkpoint=str(toy_paths["decoder"]), family="encoder-decoder"), for_lm=False)


def test_missing_path_names_the_key_and_the_path(tmp_path):
    missing = tmp_path / "no" / "such" / "model"
    with pytest.raises(HarnessError, match=r"model\.checkpoint.*no/such/model"):
        load_backbone(ModelConfig(checkpoint=str(missing)), for_lm=False)


def test_hub_id_with_the_hub_off_is_a_clear_error(monkeypatch):
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    with pytest.raises(HarnessError, match="HF_HUB_OFFLINE"):
        load_backbone(ModelConfig(checkpoint="someone/not-a-local-model"), for_lm=False)


def _pickle_copy(src, dst):
    """A copy of a toy checkpoint whose weights are a pickle file (pytorch_model.bin) only."""
    shutil.copytree(src, dst)
    state = load_file(str(dst / "model.safetensors"))
    (dst / "model.safetensors").unlink()
    torch.save(state, dst / "pytorch_model.bin")
    return dst


def test_pickle_weights_are_refused_unless_allowed(toy_paths, tmp_path):
    folder = _pickle_copy(toy_paths["encoder"], tmp_path / "pickled")
    with pytest.raises(HarnessError, match=r"pytorch_model\.bin.*model\.allow_pickle"):
        load_backbone(ModelConfig(checkpoint=str(folder)), for_lm=False)
    backbone = load_backbone(ModelConfig(checkpoint=str(folder), allow_pickle=True), for_lm=False)
    assert backbone.family == "encoder"


def test_decoder_without_pad_token_gets_a_new_dedicated_one(toy_paths, tmp_path):
    folder = shutil.copytree(toy_paths["decoder"], tmp_path / "nopad")
    tok_cfg = json.loads((folder / "tokenizer_config.json").read_text())
    tok_cfg.pop("pad_token", None)
    (folder / "tokenizer_config.json").write_text(json.dumps(tok_cfg))
    cfg = json.loads((folder / "config.json").read_text())
    cfg["pad_token_id"] = None
    (folder / "config.json").write_text(json.dumps(cfg))
    before = load_file(str(folder / "model.safetensors"))["transformer.wte.weight"].shape[0]

    backbone = load_backbone(ModelConfig(checkpoint=str(folder)), for_lm=False)
    tok = backbone.tokenizer
    assert backbone.pad_token_added and tok.pad_token == PAD_TOKEN
    assert tok.pad_token_id != tok.eos_token_id  # never eos: that would break `last` pooling and loss masks
    assert backbone.model.get_input_embeddings().weight.shape[0] == len(tok) == before + 1
    assert tok.padding_side == "right"


def test_pad_equal_to_eos_is_replaced(toy_paths, tmp_path):
    folder = shutil.copytree(toy_paths["decoder"], tmp_path / "eospad")
    tok_cfg = json.loads((folder / "tokenizer_config.json").read_text())
    tok_cfg["pad_token"] = tok_cfg["eos_token"]
    (folder / "tokenizer_config.json").write_text(json.dumps(tok_cfg))
    backbone = load_backbone(ModelConfig(checkpoint=str(folder)), for_lm=False)
    assert backbone.tokenizer.pad_token == PAD_TOKEN
    assert backbone.tokenizer.pad_token_id != backbone.tokenizer.eos_token_id


def test_max_length_beyond_positions_is_clamped_with_a_logged_warning(caplog):
    backbone = load_backbone(ModelConfig(checkpoint="toy:encoder"), for_lm=False)
    assert position_limit(backbone) == 256  # the toy's max_position_embeddings
    with caplog.at_level(logging.WARNING, logger="harness.models.backbones"):
        assert clamp_max_length(backbone, 4096) == 256
    assert "exceeds the 256 positions" in caplog.text
    assert clamp_max_length(backbone, 64) == 64


def test_layers_cut_the_model():
    backbone = load_backbone(ModelConfig(checkpoint="toy:decoder", layers=1), for_lm=False)
    assert len(backbone.model.h) == 1


def test_trust_remote_code_is_passed_only_when_set(monkeypatch):
    import transformers

    seen: list[bool] = []
    real = transformers.AutoConfig.from_pretrained

    def spy(*args, **kwargs):
        seen.append(bool(kwargs.get("trust_remote_code")))
        return real(*args, **kwargs)

    monkeypatch.setattr(transformers.AutoConfig, "from_pretrained", spy)
    load_backbone(ModelConfig(checkpoint="toy:encoder"), for_lm=False)
    off, seen[:] = list(seen), []
    load_backbone(ModelConfig(checkpoint="toy:encoder", trust_remote_code=True), for_lm=False)
    assert off and not any(off)
    assert seen and all(seen)


@pytest.mark.slow
@pytest.mark.parametrize("name, family", [("minilm-l6", "encoder"), ("smollm2-135m", "decoder")])
def test_real_assets_load_cut_to_two_layers(name, family):
    backbone = load_backbone(ModelConfig(checkpoint=f"asset:{name}", layers=2), for_lm=False)
    assert backbone.family == family
    assert backbone.tokenizer.pad_token_id != backbone.tokenizer.eos_token_id or family == "encoder"
    ids = backbone.tokenizer(["a short message about a late ferry"], return_tensors="pt")
    with torch.inference_mode():
        hidden = backbone.model(**ids).last_hidden_state
    assert hidden.shape[-1] == backbone.config.hidden_size and torch.isfinite(hidden).all()


@pytest.mark.parametrize("kind, key", [("encoder", "attention_probs_dropout_prob"), ("decoder", "attn_pdrop")])
def test_attention_dropout_reaches_the_attention_modules(kind, key):
    # The library's own config attributes (BertConfig.attention_probs_dropout_prob, GPT2Config.attn_pdrop)
    # build each layer's attention dropout; the fused attention kernel needs it at 0 (torch SDPA docs).
    plain = load_backbone(ModelConfig(checkpoint=f"toy:{kind}"), for_lm=False)
    off = load_backbone(ModelConfig(checkpoint=f"toy:{kind}", attention_dropout=0.0), for_lm=False)
    assert getattr(plain.model.config, key) > 0 and getattr(off.model.config, key) == 0.0
    def attention_rates(model):
        return [m.p for name, m in model.named_modules()
                if isinstance(m, torch.nn.Dropout) and name.endswith(("attn.attn_dropout", "attention.self.dropout"))]

    assert attention_rates(plain.model) and set(attention_rates(plain.model)) == {getattr(plain.model.config, key)}
    assert len(attention_rates(off.model)) == plain.model.config.num_hidden_layers
    assert set(attention_rates(off.model)) == {0.0}
