"""The `prompt` method: rank scoring as in next_token, no weight change, demonstrations, calibration.

Demonstrations. `method.shots: k` draws k training examples (or k of every class with
`shots_per_class`) with the run seed, in a seeded random order, and writes each with
`method.demo_template` (placeholders {text} or a pair's column names, and {label} = the label's
first word) into the `{demos}` slot. One set serves every example of a run, so the scores of
two examples differ only by their own text, and calibration sees the same demonstrations. When
the demonstrations do not fit the model's context beside an example of `train.max_length`
tokens, the last ones are dropped first and a warning is logged.

Calibration (Zhao et al. 2021, "Calibrate Before Use"). The label probabilities of a few
content-free inputs ("N/A", "", "[MASK]"), rendered through the same template and
demonstrations, are averaged into p_cf; each example's probabilities become p / p_cf,
renormalised. This removes the preference the prompt itself gives some labels.
"""

from __future__ import annotations

import logging
import random
import weakref
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import torch

from harness.config import Config
from harness.data.task import TaskData
from harness.methods.next_token import NextTokenMethod
from harness.methods.registry import Encoded, register_method
from harness.methods.templates import Template, check_text_fields, parse_template, text_values
from harness.models.backbones import Backbone, position_limit

__all__ = [
    "CONTENT_FREE",
    "PromptMethod",
    "calibrate",
    "content_free_probs",
    "draw_demonstrations",
    "fit_demonstrations",
    "render_demonstrations",
    "warn_if_not_instruction_tuned",
]

logger = logging.getLogger(__name__)

CONTENT_FREE = ("N/A", "", "[MASK]")  # the content-free strings of Zhao et al. 2021
_UNBOUNDED_CONTEXT = 2048  # demonstration budget for models with relative positions and no recorded limit


def draw_demonstrations(labels: Sequence[int], shots: int, *, per_class: bool, seed: int) -> list[int]:
    """Indices of the demonstrations: `shots` rows (or `shots` per class), seeded, in a seeded order."""
    if shots <= 0:
        return []
    rng = random.Random(seed)
    if per_class:
        chosen: list[int] = []
        for c in sorted(set(labels)):
            rows = [i for i, y in enumerate(labels) if y == c]
            chosen.extend(rng.sample(rows, min(shots, len(rows))))
    else:
        chosen = rng.sample(range(len(labels)), min(shots, len(labels)))
    rng.shuffle(chosen)  # interleave classes: a block of one class at the end biases toward it
    return chosen


def render_demonstrations(
    template: Template, texts: Sequence[str | tuple[str, str]], labels: Sequence[int],
    label_words: Sequence[tuple[str, ...]], fields: Sequence[str] = ("text",),
) -> list[str]:
    """One rendered string per demonstration; {label} is the label's first word."""
    return [
        template.render({**text_values(text, fields), "label": label_words[y][0].strip()})
        for text, y in zip(texts, labels, strict=True)
    ]


def fit_demonstrations(demos: Sequence[str], count: Callable[[str], int], budget: int) -> list[str]:
    """The longest prefix of `demos` whose joined text takes at most `budget` tokens (logs what was dropped)."""
    kept = list(demos)
    while kept and count("".join(kept)) > budget:
        kept.pop()  # the last demonstration goes first
    if len(kept) < len(demos):
        logger.warning(
            "prompt: dropped %d of %d demonstrations to fit %d tokens of context beside the example; "
            "lower method.shots or train.max_length to keep them all", len(demos) - len(kept), len(demos), budget,
        )
    return kept


def content_free_probs(predict: Callable[[list[str]], np.ndarray]) -> np.ndarray:
    """Mean label probabilities (K,) over the content-free inputs; `predict` maps texts to (n, K)."""
    probs = predict(list(CONTENT_FREE))  # (n_cf, K)
    return np.asarray(probs, dtype=np.float64).mean(axis=0)


def calibrate(probs: np.ndarray, p_cf: np.ndarray) -> np.ndarray:
    """Contextual calibration: p / p_cf per row, renormalised to sum to one. Shapes (n, K), (K,) -> (n, K)."""
    probs = np.asarray(probs, dtype=np.float64)
    # Only an exact zero (underflow) is lifted, so a label the model never gives stays finite.
    p_cf = np.clip(np.asarray(p_cf, dtype=np.float64), np.finfo(np.float64).tiny, None)
    scaled = probs / p_cf[None, :]  # (n, K)
    return scaled / scaled.sum(axis=1, keepdims=True)


def warn_if_not_instruction_tuned(tokenizer: Any, checkpoint: str) -> bool:
    """Log a warning when the tokenizer has no chat template (no sign of instruction tuning); True if it has one."""
    if getattr(tokenizer, "chat_template", None):
        return True
    logger.warning(
        "prompt: %s has no chat template, so it is probably not instruction-tuned; zero/few-shot scores "
        "of a plain language model are often near chance", checkpoint,
    )
    return False


@register_method("prompt")
class PromptMethod(NextTokenMethod):
    """Zero- or few-shot rank scoring with no weight change, optionally calibrated."""

    name = "prompt"
    trains = False

    def __init__(self, *, cfg: Config, data: TaskData, backbone: Backbone | None = None) -> None:
        super().__init__(cfg=cfg, data=data, backbone=backbone)
        m = cfg.method
        warn_if_not_instruction_tuned(self.tokenizer, cfg.model.checkpoint)
        for p in self.model.parameters():
            p.requires_grad_(False)
        self._p_cf: np.ndarray | None = None
        self._p_cf_model: weakref.ref[Any] | None = None  # the module p_cf was computed with (not kept alive)
        self.demo_rows: list[str] = []
        if m.shots == 0:
            return
        demo_template = parse_template(m.demo_template, key="method.demo_template", allowed=(*self.fields, "label"))
        check_text_fields(demo_template, self.fields)
        train = data.train
        idx = draw_demonstrations(train.labels, m.shots, per_class=m.shots_per_class, seed=cfg.train.seed)
        demos = render_demonstrations(demo_template, [train.texts[i] for i in idx], [train.labels[i] for i in idx],
                                      self.labels.words, self.fields)
        # The example keeps train.max_length tokens; demonstrations get what is left of the context.
        budget = (position_limit(self.backbone) or _UNBOUNDED_CONTEXT) - self.max_length
        kept = fit_demonstrations(demos, lambda s: len(self.tokenizer.encode(s, add_special_tokens=False, verbose=False)), budget)
        self.demos = "".join(kept)
        self.demo_rows = [train.ids[i] for i in idx[: len(kept)]]

    def trainable_parameters(self) -> list[tuple[str, torch.nn.Parameter]]:
        return []

    def content_free(self, batch_size: int) -> np.ndarray:
        """p_cf (K,): mean uncalibrated probabilities of the content-free inputs, computed once per model.

        Why per model: a copy of this method scoring with another module (the int8 copy of
        harness.runs.serving) must calibrate with that module's own p_cf.
        """
        if self._p_cf is None or self._p_cf_model is None or self._p_cf_model() is not self.lm:
            pair = self.is_pair
            self._p_cf = content_free_probs(
                lambda texts: NextTokenMethod.predict_proba(
                    self, self.encode([(t, t) if pair else t for t in texts], [-1] * len(texts)), batch_size)
            )
            self._p_cf_model = weakref.ref(self.lm)
        return self._p_cf

    def predict_proba(self, items: Sequence[Encoded], batch_size: int) -> np.ndarray:
        probs = super().predict_proba(items, batch_size)
        return calibrate(probs, self.content_free(batch_size)) if self.cfg.method.calibrate else probs

    def describe(self) -> dict[str, Any]:
        m = self.cfg.method
        return {**super().describe(), "shots": m.shots, "shots_per_class": m.shots_per_class,
                "demonstration_ids": list(self.demo_rows),
                "calibrate": m.calibrate, "content_free_probs": None if self._p_cf is None else self._p_cf.tolist()}
