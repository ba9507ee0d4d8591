"""Rank scoring: how likely the language model finds each label's words after a prompt.

The score of label y is the log-probability of its tokens after the prompt, summed
or per-token mean (`method.score`); softmax over labels gives the probabilities. A batch of
prompts runs once, left-padded (attention mask zero on the pads, position ids counted from each
prompt's first real token), with `use_cache=True`. Its key/value cache (a transformers
`DynamicCache`, tensors of shape (batch, heads, seq, head_dim) per layer) is repeated over the
label sequences with `batch_repeat_interleave`, and all labels' continuations run in one more
pass. Single-token label words need only the prompt pass. For encoder-decoder checkpoints the
label words (with the tokenizer's closing token, e.g. </s>) are the decoder target: the encoder
runs once per prompt and its outputs serve every label; (training is the ordinary seq2seq loss).
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Sequence
from typing import Any

import torch
import torch.nn.functional as F
from transformers.modeling_outputs import BaseModelOutput

from harness.methods.batches import pad_batch

__all__ = ["IGNORE_INDEX", "decoder_rank_scores", "label_log_scores", "masked_lm_loss", "pad_ids",
           "seq2seq_rank_scores", "takes_argument"]

IGNORE_INDEX = -100  # torch cross_entropy's default ignore_index


def masked_lm_loss(logits: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """Mean cross-entropy of the tokens whose target is not IGNORE_INDEX; logits at t predict targets at t+1."""
    vocab = logits.shape[-1]
    shifted = logits[:, :-1].reshape(-1, vocab)  # (batch * (seq-1), vocab)
    return F.cross_entropy(shifted.float(), targets[:, 1:].reshape(-1), ignore_index=IGNORE_INDEX)


def _device(model: torch.nn.Module) -> torch.device:
    return next(model.parameters()).device


def pad_ids(seqs: Sequence[Sequence[int]], value: int, *, left: bool = False) -> tuple[torch.Tensor, torch.Tensor]:
    """(ids, mask) of shape (n, longest), padded on the left or the right."""
    batch = pad_batch(seqs, value, side="left" if left else "right")
    return batch["input_ids"], batch["attention_mask"]


def takes_argument(model: Any, name: str) -> bool:
    """Whether `model.forward` names the keyword argument `name` (False when its signature cannot be read)."""
    try:
        return name in inspect.signature(model.forward).parameters
    except (TypeError, ValueError):  # a forward without a readable signature
        return False


def _last_position_only(model: Any) -> dict[str, Any]:
    """`logits_to_keep=1` where the model takes it: the output layer then runs on the prompts' last column only.

    Why: the prompt pass needs one distribution per prompt, and the output layer over every position
    (vocabulary x hidden per token, a fifth of a small decoder's weights) is wasted work.
    """
    return {"logits_to_keep": 1} if takes_argument(model, "logits_to_keep") else {}


@torch.inference_mode()  # like the head evaluation pass: no autograd bookkeeping at all
def decoder_rank_scores(model: Any, prompts: Sequence[Sequence[int]],
                        seqs: Sequence[Sequence[int]], pad_id: int, *, last_position_only: bool = True) -> torch.Tensor:
    """Summed log-probs (n_prompts, n_seqs) of every sequence after every prompt, prompts run once.

    `last_position_only=False` runs the output layer on every prompt position (the benchmark measures
    what that costs); the scores are the same.
    """
    device = _device(model)
    n, m = len(prompts), len(seqs)
    ids, mask = pad_ids(prompts, pad_id, left=True)  # left padding: the last column is every prompt's end
    positions = (mask.cumsum(-1) - 1).clamp(min=0)  # so padding does not shift a prompt's positions
    out = model(input_ids=ids.to(device), attention_mask=mask.to(device), position_ids=positions.to(device),
                use_cache=True, **(_last_position_only(model) if last_position_only else {}))
    first = out.logits[:, -1].float().log_softmax(-1)  # (n, vocab): distribution of the first label token
    scores = first[:, torch.tensor([s[0] for s in seqs], device=device)]  # (n, m)
    longest = max(len(s) for s in seqs)
    if longest == 1:
        return scores.cpu()
    cache = out.cache
    cache.batch_repeat_interleave(m)  # row i*m + j continues prompt i with sequence j
    feed, feed_mask = pad_ids([s[:-1] for s in seqs], pad_id)  # (m, longest-1): tokens fed after the prompt
    want, _ = pad_ids([s[1:] for s in seqs], 0)  # (m, longest-1): tokens they predict
    feed, feed_mask, want = feed.repeat(n, 1), feed_mask.repeat(n, 1), want.repeat(n, 1)  # (n*m, longest-1)
    full_mask = torch.cat([mask.repeat_interleave(m, 0), feed_mask], dim=1)  # (n*m, prompt + longest-1)
    start = mask.sum(-1).repeat_interleave(m)[:, None]  # (n*m, 1): first position after each prompt
    cont_pos = start + torch.arange(longest - 1)[None, :]
    logits = model(input_ids=feed.to(device), attention_mask=full_mask.to(device),
                   position_ids=cont_pos.to(device), cache=cache, use_cache=True).logits.float()
    logp = logits.log_softmax(-1).gather(-1, want.to(device)[..., None]).squeeze(-1)  # (n*m, longest-1)
    rest = (logp * feed_mask.to(device)).sum(-1).view(n, m)
    return (scores + rest).cpu()


@torch.inference_mode()
def seq2seq_rank_scores(model: Any, prompts: Sequence[Sequence[int]],
                        seqs: Sequence[Sequence[int]], pad_id: int, start_id: int) -> torch.Tensor:
    """Summed log-probs (n_prompts, n_seqs) of every target given every input; the encoder runs once."""
    device = _device(model)
    n, m = len(prompts), len(seqs)
    ids, mask = pad_ids(prompts, pad_id)
    mask = mask.to(device)
    encoded = model.get_encoder()(input_ids=ids.to(device), attention_mask=mask)
    hidden = encoded.last_hidden_state.repeat_interleave(m, 0)  # (n*m, seq, d_model)
    feed, feed_mask = pad_ids([(start_id, *s[:-1]) for s in seqs], pad_id)  # (m, longest): decoder inputs
    want, _ = pad_ids(seqs, 0)
    feed, feed_mask, want = feed.repeat(n, 1), feed_mask.repeat(n, 1), want.repeat(n, 1)  # (n*m, longest)
    logits = model(encoder_outputs=BaseModelOutput(last_hidden_state=hidden),
                   attention_mask=mask.repeat_interleave(m, 0), decoder_input_ids=feed.to(device),
                   decoder_attention_mask=feed_mask.to(device)).logits.float()
    logp = logits.log_softmax(-1).gather(-1, want.to(device)[..., None]).squeeze(-1)  # (n*m, longest)
    return (logp * feed_mask.to(device)).sum(-1).view(n, m).cpu()


def label_log_scores(seq_scores: torch.Tensor, lengths: Sequence[int], owner: Sequence[int], num_labels: int,
                     score: str = "sum") -> torch.Tensor:
    """(n, K) label scores from (n, m) summed sequence log-probs.

    score='mean' divides each sequence's sum by its token count first. A label with several
    sequences gets the log of their mean probability (one sequence: its own score).
    """
    if score == "mean":
        seq_scores = seq_scores / torch.tensor(list(lengths), dtype=seq_scores.dtype)[None, :]
    owner_t = torch.tensor(list(owner))
    cols = []
    for k in range(num_labels):
        part = seq_scores[:, owner_t == k]  # (n, words of label k)
        cols.append(torch.logsumexp(part, dim=1) - math.log(part.shape[1]))
    return torch.stack(cols, dim=1)
