"""How much computing a run does: parameters x real tokens x passes, counted from the run's own tokens.

Training costs about 6 N FLOPs per token (forward 2 N, backward 4 N) and a scoring pass 2 N, with
N the non-embedding parameters (Kaplan et al. 2020, "Scaling Laws for Neural Language Models",
arXiv:2001.08361, section 2.1). The tokens are the run's own: its splits tokenised by its method
through the token cache (harness.data.token_cache, so the run itself later finds them there), after
truncation at `train.max_length`. The passes are the ones the code makes:

- training: the batches the loop will see (`harness.train.batching.epoch_batches` for every epoch,
  cut at `planned_steps`, as the loop cuts them), each padded as the method's collate pads it;
- dev evaluations during training: one per epoch with `train.eval_every: 0`, one every N steps
  otherwise, plus the last one when training stops between them (as `harness.train.loop.train`);
  early stopping is not foreseen, so this is the most the run will do;
- scoring (dev evaluations and the final test scoring): every row once, in length-sorted batches of
  `eval.batch_size`; rank scoring (next_token, prompt) runs the prompt, then every label's
  continuation after it when a label word takes more than one token (harness.methods.rank_scoring);
  a few-shot prompt's demonstrations are inside every prompt's tokens; calibration scores the
  content-free inputs once more (harness.methods.prompt).

Every figure comes in two forms: real tokens (the work) and padded tokens (what the kernels see, which
the speed is measured against).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from torch import nn

from harness.config import Config
from harness.data.task import TaskData
from harness.methods.batches import batch_width
from harness.methods.head import HeadMethod
from harness.methods.next_token import NextTokenMethod
from harness.methods.prompt import CONTENT_FREE, PromptMethod
from harness.methods.registry import Encoded, Method
from harness.runs.run import encode_split
from harness.train.batching import epoch_batches
from harness.train.loop import planned_steps

__all__ = ["SCORE_FLOPS_PER_TOKEN", "TRAIN_FLOPS_PER_TOKEN", "RunWork", "Tokens", "TrainPlan", "count_work",
           "encode_run", "nonembedding_parameters", "scoring_tokens", "simulate_training"]

# Kaplan et al. 2020 (arXiv:2001.08361), section 2.1: C_forward ~ 2N per token, training C ~ 6N per token.
TRAIN_FLOPS_PER_TOKEN = 6.0
SCORE_FLOPS_PER_TOKEN = 2.0

Width = Callable[[int], int]  # the padded width of a batch whose longest row has n tokens


@dataclass(frozen=True)
class Tokens:
    """Tokens of some passes: as written (real) and as padded into batches."""

    real: int = 0
    padded: int = 0

    def __add__(self, other: Tokens) -> Tokens:
        return Tokens(self.real + other.real, self.padded + other.padded)


@dataclass(frozen=True)
class TrainPlan:
    """The training a run will do: padded tokens of every optimiser step, real tokens, dev evaluations."""

    step_tokens: tuple[int, ...] = ()
    real: int = 0
    evaluations: int = 0

    @property
    def padded(self) -> int:
        return sum(self.step_tokens)


@dataclass(frozen=True)
class RunWork:
    """A run's computing: N (non-embedding parameters), its training, one dev evaluation, the final scoring."""

    params: int
    train: TrainPlan
    dev: Tokens  # one evaluation on dev
    test: Tokens  # the final scoring (content-free inputs included)

    def train_flops(self, *, padded: bool = False) -> float:
        tokens = self.train.padded if padded else self.train.real
        return TRAIN_FLOPS_PER_TOKEN * self.params * tokens

    def dev_flops(self, *, padded: bool = False) -> float:
        """All dev evaluations during training."""
        tokens = self.dev.padded if padded else self.dev.real
        return SCORE_FLOPS_PER_TOKEN * self.params * tokens * self.train.evaluations

    def test_flops(self, *, padded: bool = False) -> float:
        return SCORE_FLOPS_PER_TOKEN * self.params * (self.test.padded if padded else self.test.real)

    def flops(self, *, padded: bool = False) -> float:
        """The whole run: 6 N x training tokens + 2 N x scored tokens."""
        return self.train_flops(padded=padded) + self.dev_flops(padded=padded) + self.test_flops(padded=padded)


def nonembedding_parameters(model: nn.Module) -> int:
    """Parameters outside `nn.Embedding` modules (Kaplan et al. 2020's N), each counted once even when tied."""
    embedded = {id(p) for m in model.modules() if isinstance(m, nn.Embedding) for p in m.parameters()}
    counted = {id(p): p.numel() for p in model.parameters() if id(p) not in embedded}  # a tied weight: one key
    return sum(counted.values())


def simulate_training(lengths: Sequence[int], labels: Sequence[int], cfg: Config, width: Width) -> TrainPlan:
    """The batches, steps and evaluations of `harness.train.loop.train` on examples of these lengths (one process).

    The loop's rules: accelerate steps the optimiser every `grad_accum` batches and at an epoch's last
    batch; an epoch that runs to its end is evaluated when `eval_every` is 0; every `eval_every` steps
    otherwise; and once more at the end when the last step was not evaluated.
    """
    t = cfg.train
    if not lengths:
        return TrainPlan()

    def batches(epoch: int) -> list[list[int]]:
        return epoch_batches(lengths, t.batch_size, mode=t.batching, pool_batches=t.pool_batches, seed=t.seed,
                             epoch=epoch, labels=labels)

    total = planned_steps(len(batches(0)), cfg)
    steps: list[int] = []
    real = evaluations = step = epoch = 0
    last_eval, current = -1, 0
    while step < total:
        order = batches(epoch)
        for n, batch in enumerate(order):
            current += len(batch) * width(max(lengths[i] for i in batch))
            real += sum(lengths[i] for i in batch)
            if (n + 1) % t.grad_accum and n + 1 < len(order):
                continue  # gradients accumulate; no optimiser step yet
            step += 1
            steps.append(current)
            current = 0
            if t.eval_every and step % t.eval_every == 0:
                evaluations, last_eval = evaluations + 1, step
            if step >= total:
                break
        else:  # the epoch ran to its end
            epoch += 1
            if not t.eval_every:
                evaluations, last_eval = evaluations + 1, step
    if last_eval != step:
        evaluations += 1
    return TrainPlan(tuple(steps), real, evaluations)


def scoring_tokens(lengths: Sequence[int], batch_size: int, width: Width, per_row: Tokens = Tokens()) -> Tokens:
    """One scoring pass over rows of these (prompt) lengths in length-sorted batches, plus `per_row` for each row
    (the label continuations of rank scoring)."""
    ordered = sorted(lengths)
    padded = sum(len(chunk) * width(chunk[-1]) for chunk in
                 (ordered[lo:lo + batch_size] for lo in range(0, len(ordered), batch_size)))
    n = len(ordered)
    return Tokens(sum(ordered) + n * per_row.real, padded + n * per_row.padded)


def _exact(n: int) -> int:
    return n


def _shape(method: Method) -> tuple[Width, Callable[[Encoded], int], Tokens]:
    """How the method pads (width of a batch), the scored length of a row, and the continuation tokens per row."""
    if isinstance(method, HeadMethod):
        limit, multiple = method.max_length, method.pad_multiple
        return (lambda n: batch_width(n, limit, multiple)), len, Tokens()
    if isinstance(method, NextTokenMethod):
        lengths = [len(s) for s in method.seqs]
        if method.seq2seq:  # the decoder runs every label's words (after the start token) for every prompt
            extra = Tokens(sum(lengths), len(lengths) * max(lengths))
        elif max(lengths) > 1:  # one more pass: every label's tokens after the first, from the repeated cache
            extra = Tokens(sum(n - 1 for n in lengths), len(lengths) * (max(lengths) - 1))
        else:  # single-token label words: the prompt pass scores them all
            extra = Tokens()
        return _exact, (lambda it: int((it.extra or {})["prompt_len"])), extra
    return _exact, len, Tokens()  # a method registered elsewhere: plain right-padded batches


def encode_run(method: Method, data: TaskData, cfg: Config) -> tuple[list[Encoded], list[Encoded], list[Encoded]]:
    """The run's train, dev and test rows as its method encodes them, through the token cache."""
    train, dev, test = (encode_split(method, split, cfg)[0] for split in data.splits())
    return train, dev, test


def count_work(cfg: Config, method: Method, train: Sequence[Encoded], dev: Sequence[Encoded],
               test: Sequence[Encoded]) -> RunWork:
    """The run's work from its encoded splits (see the module docstring for the passes counted)."""
    width, scored, per_row = _shape(method)
    plan = TrainPlan()
    if method.trains:
        plan = simulate_training([len(it) for it in train], [it.label for it in train], cfg, width)
    batch = cfg.eval.batch_size
    final = scoring_tokens([scored(it) for it in test], batch, width, per_row)
    if isinstance(method, PromptMethod) and cfg.method.calibrate:
        # content_free(): the content-free inputs, written like a row, scored once per run
        free = method.encode([(t, t) if method.is_pair else t for t in CONTENT_FREE], [-1] * len(CONTENT_FREE))
        final = final + scoring_tokens([scored(it) for it in free], batch, width, per_row)
    dev_pass = scoring_tokens([scored(it) for it in dev], batch, width, per_row) if method.trains else Tokens()
    return RunWork(nonembedding_parameters(method.model), plan, dev_pass, final)
