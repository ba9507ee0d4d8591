"""The contract every method (head, next_token, prompt) fulfils for the training loop.

The loop in `harness.train.loop` knows nothing about heads or label words: it asks the method for
encoded examples, batches them, calls `loss` on each batch and `predict_proba` on a split.
A new method is a class with these members, registered in `METHODS` (see DEVELOPERS.md).
Its constructor takes keywords `cfg` (Config) and `data` (TaskData). Optional members the runner
uses when present: `tokenizer` and `max_length` plus `cache_params()` (what else changes `encode`'s
output) for the token cache, and a `load_exported(folder)` static/class method for `tiltyard predict`.
Names of freshly initialised parameters start with "head." (they get train.head_learning_rate).
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import torch

from harness.errors import HarnessError

__all__ = ["Encoded", "Method", "METHODS", "register_method", "build_method", "load_builtin_methods", "method_modules"]


@dataclass(frozen=True)
class Encoded:
    """One tokenised example: `input_ids` plus whatever else the method's collate needs."""

    input_ids: tuple[int, ...]
    label: int
    extra: dict[str, Any] | None = None  # e.g. token_type_ids, the prompt length

    def __len__(self) -> int:
        return len(self.input_ids)


class Method(Protocol):
    """What the training loop and the runner need from a method."""

    name: str
    @property
    def model(self) -> torch.nn.Module:
        """The trainable module (backbone + head, or the LM); read-only here so a subclass type fits."""
    trains: bool  # False for `prompt`: the loop is skipped

    def encode(self, texts: Sequence[Any], labels: Sequence[int]) -> list[Encoded]:
        """Tokenise a split (cached by the caller's token cache where possible)."""

    def collate(self, items: Sequence[Encoded]) -> dict[str, torch.Tensor]:
        """Pad a batch dynamically to its longest example."""

    def loss(self, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """Mean training loss of a batch (a scalar tensor with grad)."""

    def predict_proba(self, items: Sequence[Encoded], batch_size: int) -> np.ndarray:
        """Per-label probabilities, shape (n, num_labels), rows in the order given."""

    def trainable_parameters(self) -> list[tuple[str, torch.nn.Parameter]]:
        """Named parameters the optimiser updates."""

    def save(self, folder: Any) -> None:
        """Write the trained model so that `tiltyard predict` can reload it."""

    def describe(self) -> dict[str, Any]:
        """Facts for the run folder (pooling, label-word token ids, parameter counts...)."""

    # Optional, not part of the protocol's check: `loss_weight(batch) -> float`, the weight of the
    # batch's mean loss (rows, summed class weights, target tokens). A method that has it trains in
    # length pieces (train.pieces, harness.train.loop.backward_pieces); one without, in whole batches.


def method_modules(method: Method) -> dict[str, torch.nn.Module]:
    """The method's modules, by attribute name (`model`, and e.g. next_token's `lm`, a part of it)."""
    return {name: value for name, value in vars(method).items() if isinstance(value, torch.nn.Module)}


MethodFactory = Callable[..., Method]
METHODS: dict[str, MethodFactory] = {}


def register_method(name: str) -> Callable[[MethodFactory], MethodFactory]:
    """Class decorator: make a method available as `method.kind: NAME`."""

    def wrap(factory: MethodFactory) -> MethodFactory:
        METHODS[name] = factory
        return factory

    return wrap


_BUILTIN = ("harness.methods.head", "harness.methods.next_token", "harness.methods.prompt")


def load_builtin_methods() -> dict[str, MethodFactory]:
    """Import the built-in method modules for their registration side effect; returns METHODS."""
    # Kept out of module import so that importing this module stays light.
    for module in _BUILTIN:
        importlib.import_module(module)
    return METHODS


def build_method(name: str, **kwargs: Any) -> Method:
    """Instantiate a registered method by name; factories take keywords `cfg` (Config) and `data` (TaskData)."""
    load_builtin_methods()
    if name not in METHODS:
        raise HarnessError(f"unknown method {name!r}; choose one of {', '.join(sorted(METHODS))}")
    return METHODS[name](**kwargs)
