"""Label words as next tokens: masked-loss training (`next_token`) and rank scoring (`next_token`, `prompt`).

Each example becomes prompt + label words of its gold label (+ the end-of-text token with
`method.end_token`). Only the label-word tokens carry loss: every prompt and padding position has
the ignore index, and as a causal LM predicts the next token, position t is scored on token t+1.
Truncation cuts the example's text, never the template or the label words (templates.py).

Rank scoring (the label words' log-probability after the prompt) is in `harness.methods.rank_scoring`.
Several words for one label are scored each and averaged as probabilities (`multi_word: average`);
training uses the first word. Encoder-only checkpoints are refused: they have no next-token layer.
"""

from __future__ import annotations

import copy
import json
import logging
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from harness.config import Config, config_from_dict, config_to_dict
from harness.data.task import Split, TaskData
from harness.errors import HarnessError, SettingError
from harness.files import atomic_write_text
from harness.methods.adapters import add_lora
from harness.methods.batches import count_parameters
from harness.methods.rank_scoring import (
    IGNORE_INDEX,
    decoder_rank_scores,
    label_log_scores,
    masked_lm_loss,
    pad_ids,
    seq2seq_rank_scores,
    takes_argument,
)
from harness.methods.registry import Encoded, register_method
from harness.methods.templates import (
    PromptBuilder,
    chat_frame,
    check_text_fields,
    parse_template,
    resolve_label_words,
    special_tokens_around,
    text_fields,
    tokenize_label_words,
    wants_space,
)
from harness.models.backbones import Backbone, clamp_max_length, load_backbone

__all__ = [
    "IGNORE_INDEX",
    "INFO_FILE",
    "ExportedLM",
    "NextTokenMethod",
]

logger = logging.getLogger(__name__)
INFO_FILE = "next_token.json"  # beside the saved model: label token ids and what rebuilding the method needs


@register_method("next_token")
class NextTokenMethod:
    """Train the label words as next tokens with a masked loss; predict by rank scoring."""

    name = "next_token"
    trains = True

    def __init__(self, *, cfg: Config, data: TaskData, backbone: Backbone | None = None) -> None:
        m = cfg.method
        self.cfg, self.label_names, self.is_pair = cfg, tuple(data.label_names), bool(data.is_pair)
        if backbone is None:
            backbone = load_backbone(cfg.model, for_lm=True)  # refuses encoders itself
        self.backbone, self.family = backbone, backbone.family
        if self.family == "encoder":
            raise SettingError(
                "method.kind", f"'{self.name}': {cfg.model.checkpoint} is an encoder-only checkpoint; it has no "
                "next-token output layer to score label words with. Use method.kind: head for it, or choose a "
                "decoder or encoder-decoder checkpoint"
            )
        self.tokenizer, self.seq2seq = backbone.tokenizer, self.family == "encoder-decoder"
        self.model: Any = backbone.model  # a transformers PreTrainedModel (or its peft wrapper)
        if self.model.get_output_embeddings() is None:
            raise HarnessError(f"{cfg.model.checkpoint}: loaded without its language-model output layer; "
                               "load the backbone with for_lm=True")
        tok = self.tokenizer
        self.pad_id = next(i for i in (tok.pad_token_id, tok.eos_token_id, 0) if i is not None)
        self.fields = text_fields(cfg.task.text)  # {text}, and a pair's two column names
        self.template = parse_template(m.template, key="method.template", allowed=(*self.fields, "demos"))
        check_text_fields(self.template, self.fields)
        words = resolve_label_words(m.label_words, self.label_names)
        lead, trail = special_tokens_around(tok)
        self.max_length = clamp_max_length(backbone, cfg.train.max_length)
        self.chat = None if self.seq2seq and m.chat != "always" else chat_frame(tok, m.chat, cfg.model.checkpoint)
        if self.seq2seq and self.chat is not None:
            raise SettingError("method.chat", "chat framing is for decoders; an encoder-decoder's prompt is its "
                               "encoder input: use 'never'")
        if self.seq2seq:  # label words are a target sequence of their own, closed as the tokenizer closes one
            self.labels = tokenize_label_words(tok, words, self.label_names, context="", space=False, end_ids=trail)
            limit = self.max_length
        else:
            context = self.chat.tail if self.chat else self.template.tail  # what the label words follow
            space = wants_space(m.space_prefix, context, tok)
            end = (tok.eos_token_id,) if m.end_token and tok.eos_token_id is not None else ()
            self.labels = tokenize_label_words(tok, words, self.label_names, context=context,
                                               space=space, end_ids=end)
            limit, trail = self.max_length - self.labels.longest, ()  # a closing eos would end the prompt early
        self.builder = PromptBuilder(self.template, tok, limit=limit, lead=lead, trail=trail,
                                     limit_key="train.max_length", fields=self.fields, chat=self.chat)
        self.seqs, self.owner = self.labels.variants(m.multi_word)
        self.lm = self._adapt(m)
        self.demos = ""
        # Models whose forward takes a boolean (batch, seq) `logits_to_keep` (transformers' decoders do) run
        # the output layer on the label-word positions only in `loss`; the others on every position.
        self._keeps_positions = not self.seq2seq and takes_argument(self.lm, "logits_to_keep")

    def _adapt(self, m: Any) -> Any:
        """Apply method.freeze / method.lora; return the module to call for forward passes."""
        if m.freeze == "backbone":
            raise SettingError("method.freeze", "'backbone' would leave next_token nothing to train (the output layer "
                               "is part of the language model); use 'none', 'embeddings' or method.lora")
        if m.freeze == "embeddings":
            self.model.get_input_embeddings().weight.requires_grad_(False)  # tied models freeze the output layer too
        if m.lora is None:
            return self.model
        self.model = add_lora(self.model, m.lora, seed=self.cfg.train.seed,
                              task_type="SEQ_2_SEQ_LM" if self.seq2seq else "CAUSAL_LM")
        return self.model.get_base_model()  # the adapted model itself: takes `cache=` like any other

    # -- Method protocol -------------------------------------------------------------------------

    def cache_params(self) -> dict[str, Any]:
        """What besides tokenizer, data and max_length changes `encode`'s output."""
        m = self.cfg.method
        return {"method": self.name, "template": m.template, "demos": self.demos, "family": self.family,
                "chat": self.chat.wrap("") if self.chat else None,
                "label_ids": [[list(ids) for ids in per_label] for per_label in self.labels.ids]}

    def encode(self, texts: Sequence[Any], labels: Sequence[int]) -> list[Encoded]:
        """Prompt ids (+ gold label-word ids for decoders; as `target` for encoder-decoders). Label -1: none."""
        out = []
        extra_limit = len(self._demo_ids)
        for text, y in zip(texts, labels, strict=True):
            prompt = self.builder.build(text, self.demos, extra_limit=extra_limit)
            target = self.labels.ids[y][0] if y >= 0 else ()
            if self.seq2seq:
                out.append(Encoded(prompt, int(y), {"prompt_len": len(prompt), "target": target}))
            else:
                out.append(Encoded(prompt + target, int(y), {"prompt_len": len(prompt)}))
        return out

    @property
    def _demo_ids(self) -> tuple[int, ...]:
        return tuple(self.tokenizer.encode(self.demos, add_special_tokens=False, verbose=False)) if self.demos else ()

    def collate(self, items: Sequence[Encoded]) -> dict[str, torch.Tensor]:
        """Right-padded ids and mask, token targets (IGNORE_INDEX off the label words) and class labels."""
        ids, mask = pad_ids([it.input_ids for it in items], self.pad_id)
        if self.seq2seq:
            targets, _ = pad_ids([(it.extra or {})["target"] for it in items], IGNORE_INDEX)
        else:
            targets = torch.full_like(ids, IGNORE_INDEX)
            for i, it in enumerate(items):
                start = (it.extra or {})["prompt_len"]
                targets[i, start : len(it)] = ids[i, start : len(it)]
        return {"input_ids": ids, "attention_mask": mask, "target_ids": targets,
                "labels": torch.tensor([it.label for it in items], dtype=torch.long)}

    def loss(self, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """Mean cross-entropy of the gold label words (decoder: masked LM loss; encoder-decoder: seq2seq)."""
        if self.seq2seq:
            return self.lm(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"],
                           labels=batch["target_ids"]).loss
        targets = batch["target_ids"]
        if not self._keeps_positions:
            logits = self.lm(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).logits
            return masked_lm_loss(logits, targets)
        # The output layer only where a label-word token is predicted: position t scores token t+1, and every
        # prompt position has no target. Why: vocabulary x hidden per position was a fifth of SmolLM2-135M's
        # forward work, and its (batch, seq, vocab) logits the largest activation (scripts/benchmark.py).
        keep = torch.zeros_like(targets, dtype=torch.bool)
        keep[:, :-1] = targets[:, 1:] != IGNORE_INDEX
        logits = self.lm(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"],
                         logits_to_keep=keep).logits  # (kept positions, vocab)
        return F.cross_entropy(logits.float(), targets[:, 1:][keep[:, :-1]])

    def loss_weight(self, batch: dict[str, torch.Tensor]) -> float:
        """What `loss` averages over: the label-word tokens predicted (targets other than IGNORE_INDEX)."""
        targets = batch["target_ids"] if self.seq2seq else batch["target_ids"][:, 1:]
        return float((targets != IGNORE_INDEX).sum())

    def label_scores(self, prompts: Sequence[Sequence[int]], batch_size: int) -> torch.Tensor:
        """(n, K) label scores (sum or mean log-probs, words averaged) of prompt token sequences."""
        order = sorted(range(len(prompts)), key=lambda i: len(prompts[i]))  # similar lengths pad less
        out = torch.empty((len(prompts), len(self.label_names)))
        lengths = [len(s) for s in self.seqs]
        was_training = self.lm.training
        self.lm.eval()
        try:
            for lo in range(0, len(order), batch_size):
                idx = order[lo : lo + batch_size]
                chunk = [prompts[i] for i in idx]
                if self.seq2seq:
                    start = self.lm.config.decoder_start_token_id
                    raw = seq2seq_rank_scores(self.lm, chunk, self.seqs, self.pad_id,
                                              self.pad_id if start is None else start)
                else:
                    raw = decoder_rank_scores(self.lm, chunk, self.seqs, self.pad_id)
                out[idx] = label_log_scores(raw, lengths, self.owner, len(self.label_names), self.cfg.method.score)
        finally:
            self.lm.train(was_training)
        return out

    def predict_proba(self, items: Sequence[Encoded], batch_size: int) -> np.ndarray:
        """(n, K) probabilities: softmax over labels of the rank scores."""
        prompts = [it.input_ids[: (it.extra or {})["prompt_len"]] for it in items]
        if not prompts:
            return np.zeros((0, len(self.label_names)))
        return self.label_scores(prompts, batch_size).double().softmax(-1).numpy()  # float64: tiny p survive

    def trainable_parameters(self) -> list[tuple[str, torch.nn.Parameter]]:
        return [(n, p) for n, p in self.model.named_parameters() if p.requires_grad]

    def save(self, folder: Any) -> None:
        """The model (adapters merged in) and tokenizer, plus INFO_FILE: what `load_exported` rebuilds from."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        # A merged copy: a plain checkpoint any transformers install reads, while this method keeps its adapters.
        plain = copy.deepcopy(self.model).merge_and_unload() if self.cfg.method.lora is not None else self.model
        plain.save_pretrained(folder)
        self.tokenizer.save_pretrained(folder)
        info = {**self.describe(), "labels": list(self.label_names), "is_pair": self.is_pair,
                "max_length": self.max_length, "demos": self.demos,
                "method_config": {k: v for k, v in config_to_dict(self.cfg)["method"].items() if k != "lora"}}
        atomic_write_text(folder / INFO_FILE, json.dumps(info, indent=2, ensure_ascii=False))

    @classmethod
    def load_exported(cls, folder: Path) -> ExportedLM:
        """Reload a saved run's model for `tiltyard predict` (see harness.runs.predict.load_exported)."""
        path = Path(folder) / INFO_FILE
        if not path.exists():
            raise HarnessError(f"{folder} holds no exported next_token/prompt model ({INFO_FILE} is missing)")
        info = json.loads(path.read_text(encoding="utf-8"))
        method = {**info["method_config"], "shots": 0}  # the saved demonstrations are restored below
        cfg = config_from_dict({"task": {"name": "exported", "train": "-"}, "model": {"checkpoint": str(folder)},
                                "method": method, "train": {"max_length": info["max_length"]}})
        empty = Split("train", (), (), ())
        data = TaskData(empty, empty, empty, tuple(info["labels"]), bool(info["is_pair"]))
        m = cls(cfg=cfg, data=data, backbone=load_backbone(cfg.model, for_lm=True))
        m.demos = info["demos"]
        return ExportedLM(m)

    def describe(self) -> dict[str, Any]:
        m = self.cfg.method
        total = count_parameters(self.model)[1]
        return {
            "kind": self.name, "family": self.family, "template": m.template, "score": m.score,
            "multi_word": m.multi_word, "space_prefix": m.space_prefix, "space_added": self.labels.space,
            "end_token": m.end_token, "chat": self.chat is not None,
            "label_words": self.labels.describe(self.label_names, self.tokenizer),
            "parameters": total, "trainable_parameters": sum(p.numel() for _, p in self.trainable_parameters()),
        }


class ExportedLM:
    """A reloaded next_token/prompt model: `label_names` and `predict_proba(texts)`."""

    def __init__(self, method: NextTokenMethod) -> None:
        self.method, self.label_names = method, method.label_names

    def predict_proba(self, texts: Sequence[Any], batch_size: int = 32) -> np.ndarray:
        return self.method.predict_proba(self.method.encode(texts, [-1] * len(texts)), batch_size)
