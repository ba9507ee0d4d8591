"""The order of training examples: plain shuffled batches, or length-grouped batches within shuffled pools.

`grouped` shuffles the examples, cuts them into pools of `pool_batches` batches, orders each pool by
length and cuts it into batches, then shuffles the order of all batches. Padding shrinks (a batch
holds similar lengths) while every batch still mixes examples from across the set. A global length
sort would not: on data where length tracks the label, whole runs of batches would hold one class
and a decoder learns to predict that class.

Pools alone are not enough when length tracks the label: sorted by length, the longest batches of
every pool of SMS messages were nearly all spam and the rest all ham, and a 4-layer SmolLM2 with a
head ended near the majority class (89.5 % test accuracy, against 96.9 % with random batches;
scripts/benchmark.py settings, seed 13). So when the labels are given, a pool is ordered by each
example's length rank *within its own class* (its quantile among the pool's examples of that
label): every batch then holds the classes in about the pool's proportions, each class by examples
of similar length.

The order depends only on (seed, epoch), never on the global random stream, so a resumed run
replays exactly the batches an uninterrupted run sees.

Class-mixed batches still pad short examples to the long ones where length tracks the label (a
batch of SMS ham padded to its spam). `length_pieces` splits a batch into pieces of similar length
that run their forward and backward passes one after the other into the same gradient (one
optimiser step over the whole batch, see harness.train.loop): the class mix of every step stays,
and each piece pads only to its own longest example.
"""

from __future__ import annotations

import math
import random
from collections.abc import Callable, Iterator, Sequence
from typing import Any

__all__ = ["EpochBatches", "PIECE_OVERHEAD", "PIECE_STEP", "PieceCollate", "epoch_batches", "length_pieces"]

# The fixed cost of one more forward + backward pass, in padded tokens: MiniLM-L6 under bf16 autocast
# on a 2-core CPU took about 45 ms + 0.3 ms per token (batches of 2-64 rows, 16-64 tokens; measured
# for this choice, 2026-12-03). Bigger models cost more per token for the same fixed cost, so fewer
# tokens would do for them; this value errs towards fewer pieces.
PIECE_OVERHEAD = 160
# Rows per piece come in multiples of PIECE_STEP (the last piece holds the rest): every new
# (rows, width) shape makes the CPU's bf16 matrix library build and cache kernels for it, which
# costs time and holds memory (MiniLM: 104 shapes in 2 epochs of SMS spam with free cuts).
PIECE_STEP = 4


def _by_class_quantile(chunk: list[int], lengths: Sequence[int], labels: Sequence[int]) -> list[int]:
    """`chunk` ordered by each example's length quantile within its own label.

    Every class is spread evenly along the order (class c's r-th shortest of n sits at (r + 0.5) / n),
    so each cut of the order holds the classes in the pool's proportions, each by similar lengths.
    """
    members: dict[int, list[int]] = {}
    for i in chunk:
        members.setdefault(labels[i], []).append(i)
    key: dict[int, float] = {}
    for group in members.values():
        ranked = sorted(group, key=lambda i: lengths[i])  # stable: equal lengths keep their shuffled order
        key.update({i: (rank + 0.5) / len(ranked) for rank, i in enumerate(ranked)})
    return sorted(chunk, key=lambda i: key[i])  # stable: ties between classes keep the shuffled order


def length_pieces(lengths: Sequence[int], max_pieces: int, overhead: int = PIECE_OVERHEAD, *,
                  width: Callable[[int], int] | None = None, step: int = 1) -> list[list[int]]:
    """Positions of a batch cut into at most `max_pieces` runs of similar length, shortest first.

    The cut minimises padded tokens + `overhead` per piece over every way of cutting the batch's
    length order into contiguous runs (dynamic programming over the sorted lengths). A piece is
    padded to `width(its longest row)` (the collate's own rounding; the longest row itself when
    None), and every piece but the last holds a multiple of `step` rows, so fewer distinct shapes
    reach the matrix kernels. Every position appears exactly once; one piece (the whole batch)
    when cutting saves nothing.
    """
    order = sorted(range(len(lengths)), key=lambda i: lengths[i])  # stable
    n, k_max = len(order), max(1, min(max_pieces, len(order)))
    pad = [width(lengths[i]) if width else lengths[i] for i in order]  # sorted, so pad[j - 1] is a piece's width
    ends = [j for j in range(1, n + 1) if j % step == 0 or j == n]
    inf = float("inf")
    # best[k][j]: cheapest cost of the first j sorted rows in k pieces; back[k][j]: where its last piece starts
    best = [[inf] * (n + 1) for _ in range(k_max + 1)]
    back = [[0] * (n + 1) for _ in range(k_max + 1)]
    best[0][0] = 0.0
    for k in range(1, k_max + 1):
        for j in ends:
            for i in (0, *ends):  # the last piece holds sorted rows i..j-1, padded to pad[j-1]
                if i >= j:
                    break
                cost = best[k - 1][i] + (j - i) * pad[j - 1] + overhead
                if cost < best[k][j]:
                    best[k][j], back[k][j] = cost, i
    k = min(range(1, k_max + 1), key=lambda kk: (best[kk][n], kk))  # ties: fewer pieces
    pieces: list[list[int]] = []
    j = n
    while k:
        i = back[k][j]
        pieces.append(order[i:j])
        j, k = i, k - 1
    return pieces[::-1]


def epoch_batches(lengths: Sequence[int], batch_size: int, *, mode: str, pool_batches: int, seed: int,
                  epoch: int, labels: Sequence[int] | None = None) -> list[list[int]]:
    """Index batches for one epoch; every example appears exactly once. `labels` keep grouped batches class-mixed."""
    rng = random.Random(f"{seed}:{epoch}")  # string seeds hash deterministically (sha512), across runs
    order = list(range(len(lengths)))
    rng.shuffle(order)
    if mode == "random":
        return [order[i:i + batch_size] for i in range(0, len(order), batch_size)]
    if mode != "grouped":
        raise ValueError(f"unknown batching mode {mode!r}")  # internal: the config allows only these two
    pool = batch_size * pool_batches
    batches: list[list[int]] = []
    for start in range(0, len(order), pool):
        chunk = order[start:start + pool]
        if labels is None:
            chunk.sort(key=lambda i: lengths[i])  # stable: equal lengths keep their shuffled order
        else:
            chunk = _by_class_quantile(chunk, lengths, labels)
        batches.extend(chunk[i:i + batch_size] for i in range(0, len(chunk), batch_size))
    rng.shuffle(batches)
    return batches


class EpochBatches:
    """A batch sampler for DataLoader whose epoch is chosen by the training loop (`use_epoch`).

    Deliberately no `set_epoch`: accelerate calls that with its own counter, which restarts at 0
    when a run resumes. Deliberately no `batch_size` attribute either: accelerate, sharding batches
    over several processes, would take every batch to be that size and silently drop the shorter
    ones (each pool's last batch); without it, it hands out whole batches of any length.
    """

    def __init__(self, lengths: Sequence[int], batch_size: int, *, mode: str, pool_batches: int, seed: int,
                 labels: Sequence[int] | None = None) -> None:
        self.lengths = list(lengths)
        self.labels = None if labels is None else list(labels)
        self.size = batch_size
        self.mode = mode
        self.pool_batches = pool_batches
        self.seed = seed
        self.epoch = 0

    def use_epoch(self, epoch: int) -> None:
        self.epoch = epoch

    def __iter__(self) -> Iterator[list[int]]:
        return iter(epoch_batches(self.lengths, self.size, mode=self.mode, pool_batches=self.pool_batches,
                                  seed=self.seed, epoch=self.epoch, labels=self.labels))

    def __len__(self) -> int:
        return math.ceil(len(self.lengths) / self.size)


class PieceCollate:
    """A DataLoader collate_fn: a batch of encoded examples -> its list of padded pieces (`length_pieces`).

    `max_pieces` 1 gives the whole batch as its only piece. The examples' `len()` is their token
    count; `width` is the collate's padded width of a piece by its longest row.
    """

    def __init__(self, collate: Callable[[Sequence[Any]], Any], max_pieces: int, *, overhead: int = PIECE_OVERHEAD,
                 width: Callable[[int], int] | None = None, step: int = PIECE_STEP) -> None:
        self.collate = collate
        self.max_pieces = max_pieces
        self.overhead, self.width, self.step = overhead, width, step

    def __call__(self, items: Sequence[Any]) -> list[Any]:
        if self.max_pieces <= 1 or len(items) < 2:
            return [self.collate(items)]
        cut = length_pieces([len(it) for it in items], self.max_pieces, self.overhead, width=self.width, step=self.step)
        return [self.collate([items[i] for i in piece]) for piece in cut]
