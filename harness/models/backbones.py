"""Load a pretrained checkpoint and its tokenizer, detect its family, fix the tokenizer for batching.

`model.checkpoint` may be a local folder, a `.gguf` file, `asset:NAME` (a checkpoint a package
ships), `toy:KIND` (a tiny random checkpoint) or, only when the hub is explicitly enabled, a hub
id. Everything here runs offline by default: HF_HUB_OFFLINE defaults to 1.

Decoders without a padding token get a new, dedicated `<|pad|>` token (embeddings resized). The
end-of-sequence token is never reused as padding: a text that really ends in it would then look
like padding to anything that finds padding by token id (the library's sequence classifiers, loss
masks built from ids), and the exported model would pool at the wrong position.
"""

from __future__ import annotations

import logging
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import torch
import transformers as tf
from transformers.models.auto import modeling_auto
from transformers.models.auto.modeling_auto import MODEL_FOR_CAUSAL_LM_MAPPING_NAMES

from harness.config import ModelConfig
from harness.errors import SettingError
from harness.models.assets import resolve_checkpoint
from harness.models.cut import cut_model_in_memory
from harness.models.quiet import quiet_library
from harness.models.toy import ensure_toy

__all__ = ["Backbone", "PAD_TOKEN", "clamp_max_length", "detect_family", "hub_offline", "load_backbone",
           "position_limit", "resolve_source"]

log = logging.getLogger(__name__)

Family = Literal["encoder", "decoder", "encoder-decoder"]
PAD_TOKEN = "<|pad|>"
_PICKLE_SUFFIXES = (".bin", ".pt", ".pth", ".ckpt", ".pkl")
# Bidirectional encoders by model_type (transformers' own names); anything causal is a decoder.
_ENCODER_TYPES = {"bert", "roberta", "distilbert", "electra", "deberta", "deberta-v2", "xlm-roberta", "albert",
                  "mpnet", "camembert", "modernbert", "nomic_bert", "xlm-roberta-xl", "ernie", "megatron-bert"}
_HUB_ID = re.compile(r"^[A-Za-z0-9][\w.-]*(/[\w.-]+)?$")


@dataclass
class Backbone:
    """A loaded checkpoint: the model, its tokenizer, its family and where it came from."""

    model: Any  # a transformers PreTrainedModel
    tokenizer: Any  # a transformers tokenizer
    family: Family
    config: Any  # the model's PretrainedConfig
    source: Path | str
    pad_token_added: bool = False
    notes: list[str] = field(default_factory=list)


def hub_offline() -> bool:
    """True unless the user set HF_HUB_OFFLINE to 0/false: the machines reach no model hub."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    return os.environ["HF_HUB_OFFLINE"].strip().lower() not in ("0", "false", "no", "off")


def resolve_source(checkpoint: str) -> tuple[Path | str, str | None]:
    """(folder or hub id, gguf file name or None) for a `model.checkpoint` value."""
    if checkpoint.startswith("toy:"):
        return ensure_toy(checkpoint[len("toy:"):]), None
    if checkpoint.startswith("asset:"):
        path = Path(resolve_checkpoint(checkpoint[len("asset:"):]))
    else:
        path = Path(checkpoint).expanduser()
    if path.is_file():
        if path.suffix.lower() != ".gguf":
            raise SettingError("model.checkpoint", f"{checkpoint!r} is a file but not a .gguf file; "
                               "give a checkpoint folder or a .gguf file")
        return path.parent, path.name
    if path.is_dir():
        return path, None
    looks_like_path = checkpoint.startswith((".", "/", "~")) or checkpoint.count("/") > 1 or checkpoint.endswith(".gguf")
    if looks_like_path or not _HUB_ID.match(checkpoint) or checkpoint.startswith("asset:"):
        raise SettingError("model.checkpoint", f"{checkpoint!r} ({path}) does not exist; give a checkpoint folder, "
                           "a .gguf file, asset:NAME or toy:KIND")
    return checkpoint, None  # a hub id


def _check_weight_files(folder: Path, cfg: ModelConfig) -> None:
    """Refuse pickle-only checkpoints: unpickling runs code, safetensors and GGUF do not."""
    names = [p.name for p in folder.iterdir() if p.is_file()]
    if any(n.endswith(".safetensors") or n.endswith(".safetensors.index.json") for n in names):
        return
    pickles = sorted(n for n in names if n.endswith(_PICKLE_SUFFIXES) and n != "training_args.bin")
    if pickles and not cfg.allow_pickle:
        raise SettingError("model.checkpoint", f"{folder / pickles[0]} holds pickle weights (loading them can run code); "
                           "convert them to safetensors or set model.allow_pickle: true if you trust the source")


def detect_family(config: Any) -> Family:
    """encoder / decoder / encoder-decoder from a checkpoint config (is_encoder_decoder, architectures, type)."""
    if getattr(config, "is_encoder_decoder", False):
        return "encoder-decoder"
    model_type = getattr(config, "model_type", "")
    architectures = " ".join(getattr(config, "architectures", None) or [])
    if model_type in _ENCODER_TYPES or re.search(r"For(MaskedLM|PreTraining)\b", architectures):
        return "encoder"
    if re.search(r"(ForCausalLM|LMHeadModel)\b", architectures) or getattr(config, "is_decoder", False):
        return "decoder"

    if model_type in MODEL_FOR_CAUSAL_LM_MAPPING_NAMES:
        return "decoder"
    raise SettingError("model.family", f"cannot tell the family of model type {model_type!r} "
                       f"({architectures or 'no architectures'}); set model.family to encoder, decoder or encoder-decoder")


# The library's auto classes for text: a model type none of them knows (vision, audio) cannot classify text.
_TEXT_MAPPINGS = ("MODEL_FOR_MASKED_LM_MAPPING_NAMES", "MODEL_FOR_CAUSAL_LM_MAPPING_NAMES",
                  "MODEL_FOR_SEQ_TO_SEQ_CAUSAL_LM_MAPPING_NAMES", "MODEL_FOR_SEQUENCE_CLASSIFICATION_MAPPING_NAMES",
                  "MODEL_FOR_TEXT_ENCODING_MAPPING_NAMES")


def _check_text_model(config: Any, where: str) -> None:
    """Refuse a checkpoint whose model type no text auto class of transformers knows (e.g. a vision model)."""
    text_types: set[str] = set()
    for name in _TEXT_MAPPINGS:
        text_types.update(getattr(modeling_auto, name, {}))
    model_type = getattr(config, "model_type", "")
    if model_type and model_type not in text_types:
        architectures = ", ".join(getattr(config, "architectures", None) or []) or "no architectures listed"
        raise SettingError("model.checkpoint", f"{where} is a {model_type!r} model ({architectures}), not a text model: transformers has "
                           "no masked-LM, causal-LM, seq2seq or sequence-classification class for it; "
                           "give a text checkpoint")


def _model_class(family: Family, for_lm: bool) -> Any:
    if family == "encoder":
        if for_lm:
            raise SettingError("model.checkpoint", "an encoder, but this method scores label words with a language-model "
                               "output layer, which needs a decoder or encoder-decoder checkpoint (use method.kind: head)")
        return tf.AutoModel
    if family == "decoder":
        return tf.AutoModelForCausalLM if for_lm else tf.AutoModel
    # A head on an encoder-decoder reads the encoder's states only; the decoder would need targets.
    return tf.AutoModelForSeq2SeqLM if for_lm else tf.AutoModelForTextEncoding


def load_backbone(model_cfg: ModelConfig, *, for_lm: bool) -> Backbone:
    """Load `model_cfg.checkpoint` as a bare model (for_lm=False) or with its LM output layer (for_lm=True)."""
    offline = hub_offline()
    source, gguf = resolve_source(model_cfg.checkpoint)
    if isinstance(source, Path) and gguf is None:
        _check_weight_files(source, model_cfg)
    common: dict[str, Any] = {"local_files_only": offline}
    if gguf is not None:
        common["gguf_file"] = gguf
    if model_cfg.trust_remote_code:
        common["trust_remote_code"] = True
        # One line, every time: the switch runs code from the checkpoint folder with the user's rights.
        log.warning("model.trust_remote_code is on: loading %s may run Python code shipped with the checkpoint; "
                    "keep it off unless you trust where the checkpoint came from", model_cfg.checkpoint)
    where = repr(model_cfg.checkpoint)
    try:
        config = tf.AutoConfig.from_pretrained(str(source), **common)
    except OSError as exc:
        if not isinstance(source, Path) and offline:
            raise SettingError("model.checkpoint", f"{where} is not a local folder or file, and the model hub is off (HF_HUB_OFFLINE); "
                               "give a local checkpoint folder, asset:NAME or toy:KIND") from None
        raise SettingError("model.checkpoint", f"{where} has no readable config ({str(exc).splitlines()[0]})") from None
    except ValueError as exc:  # an unknown model type, or one that needs trust_remote_code
        raise SettingError("model.checkpoint", f"{where} cannot be read: {str(exc).splitlines()[0]}") from None
    if not model_cfg.trust_remote_code:
        _check_text_model(config, where)
    family: Family = detect_family(config) if model_cfg.family == "auto" else model_cfg.family
    if model_cfg.attention_dropout is not None:
        _set_attention_dropout(config, model_cfg.attention_dropout, f"model.checkpoint {where}")
    weights: dict[str, Any] = {"dtype": torch.float32}  # CPU training in fp32; GGUF is dequantised to fp32
    if gguf is None and not model_cfg.allow_pickle:
        weights["use_safetensors"] = True
    with quiet_library():
        try:
            tokenizer = tf.AutoTokenizer.from_pretrained(str(source), **common)
            model = _model_class(family, for_lm).from_pretrained(str(source), config=config, **common, **weights)
        except (OSError, ValueError) as exc:
            raise SettingError("model.checkpoint", f"{where} cannot be loaded as a {family} ({str(exc).splitlines()[0]})") from None
    if model_cfg.layers is not None:
        model = cut_model_in_memory(model, model_cfg.layers)
    backbone = Backbone(model, tokenizer, family, model.config, source)
    _fix_padding(backbone)
    return backbone


# The config attribute that holds attention-weight dropout, by architecture (BERT-like, GPT-2, Llama-like and most
# recent decoders). T5 has none: its one dropout_rate covers every layer.
_ATTENTION_DROPOUT_KEYS = ("attention_probs_dropout_prob", "attn_pdrop", "attention_dropout")


def _set_attention_dropout(config: Any, p: float, where: str) -> None:
    """Set the attention-weight dropout on the checkpoint's config before the model is built.

    Why it is a setting: with dropout on the attention weights, torch's fused attention kernel cannot run,
    so every layer keeps its (batch, heads, seq, seq) weights for the backward pass. With 0, MiniLM on SMS
    spam peaked about 300 MB lower at about 0.9x the speed (scripts/benchmark.py, memory table).
    """
    keys = [k for k in _ATTENTION_DROPOUT_KEYS if hasattr(config, k)]
    if not keys:
        raise SettingError("model.attention_dropout", f"{where} ({type(config).__name__}) has no attention-dropout "
                           f"setting (looked for {', '.join(_ATTENTION_DROPOUT_KEYS)}); remove the key")
    for key in keys:
        setattr(config, key, p)


def _fix_padding(backbone: Backbone) -> None:
    """Give the tokenizer a pad token distinct from eos (adding one if needed) and pad on the right."""
    tok, model = backbone.tokenizer, backbone.model
    eos = tok.eos_token_id
    if tok.pad_token_id is None or (backbone.family == "decoder" and tok.pad_token_id == eos):
        tok.add_special_tokens({"pad_token": PAD_TOKEN})
        old = model.get_input_embeddings().weight.shape[0]
        if len(tok) > old:
            # mean_resizing=False: the library's resize samples from the global RNG; the new row is set
            # to the mean embedding instead, deterministically. Padding is masked, so its value hardly matters.
            model.resize_token_embeddings(len(tok), mean_resizing=False)
            with torch.no_grad():
                emb = model.get_input_embeddings().weight
                emb[old:] = emb[:old].mean(dim=0, keepdim=True)
        backbone.pad_token_added = True
        backbone.notes.append(f"added pad token {PAD_TOKEN!r} (id {tok.pad_token_id}); eos is never used as padding")
    model.config.pad_token_id = tok.pad_token_id
    tok.padding_side = "right"  # training batches pad on the right; `last` pooling handles either side


def position_limit(backbone: Backbone) -> int | None:
    """The longest input the model can take (absolute position embeddings), or None when unbounded."""
    return positions_of(backbone.config, backbone.tokenizer)


def positions_of(config: Any, tokenizer: Any) -> int | None:
    """`position_limit` from a checkpoint's config and tokenizer alone (no weights loaded)."""
    limits = [getattr(config, name, None) for name in ("max_position_embeddings", "n_positions", "n_ctx")]
    tok_max = getattr(tokenizer, "model_max_length", None)
    # Tokenizers without a recorded limit report a huge sentinel (about 1e30).
    if isinstance(tok_max, int) and tok_max < 1_000_000:
        limits.append(tok_max)
    found = [x for x in limits if isinstance(x, int) and x > 0]
    return min(found) if found else None


def clamp_max_length(backbone: Backbone, max_length: int) -> int:
    """`train.max_length`, lowered (with a logged warning) to what the checkpoint's positions allow."""
    limit = position_limit(backbone)
    if limit is not None and max_length > limit:
        log.warning("train.max_length %d exceeds the %d positions of %s: the model was never trained on longer "
                    "inputs, so it is cut to %d", max_length, limit, backbone.source, limit)
        backbone.notes.append(f"train.max_length {max_length} clamped to {limit}")
        return limit
    return max_length
