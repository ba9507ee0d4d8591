"""Every registered method, through the whole `Method` protocol, on the toy checkpoints.

Driven by the registry: a method registered tomorrow is run through encode, collate, loss,
predict_proba, save and reload here the day it is added. The reload is what `tiltyard predict`
does (harness.runs.predict.load_exported); it must give the probabilities of the live method.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch

from harness.config import config_from_dict
from harness.data.task import load_task
from harness.methods.head_export import load_head_model
from harness.methods.registry import METHODS, build_method, load_builtin_methods
from tests.common import ferry_dict

load_builtin_methods()
# Extra settings a method needs on the ferry task; a method without an entry runs on its defaults.
SETTINGS: dict[str, dict[str, Any]] = {
    "next_token": {"template": "Message: {text}\nTopic:"},
    "prompt": {"template": "{demos}Message: {text}\nTopic:", "shots": 2, "calibrate": True},
}
CHECKPOINTS = ["toy:encoder", "toy:decoder", "toy:encoder-decoder"]
CASES = [(kind, checkpoint) for kind in sorted(METHODS) for checkpoint in CHECKPOINTS
         if not (kind != "head" and checkpoint == "toy:encoder")]  # label words need a language-model layer


def test_the_cases_cover_every_registered_method() -> None:
    assert {"head", "next_token", "prompt"} <= set(METHODS)
    assert {kind for kind, _ in CASES} == set(METHODS)


def _reload(kind: str, folder: Path) -> Any:
    return load_head_model(folder) if kind == "head" else METHODS[kind].load_exported(folder)  # type: ignore[attr-defined]


@pytest.mark.parametrize("kind, checkpoint", CASES, ids=[f"{k}-{c.split(':')[1]}" for k, c in CASES])
def test_method_contract(kind: str, checkpoint: str, tmp_path: Path) -> None:
    cfg = config_from_dict(ferry_dict(tmp_path / "runs", rows=12, checkpoint=checkpoint,
                                      method={"kind": kind, **SETTINGS.get(kind, {})}))
    data = load_task(cfg.task, seed=cfg.train.seed)
    method = build_method(kind, cfg=cfg, data=data)
    n_labels = len(data.label_names)

    items = method.encode(data.train.texts[:6], data.train.labels[:6])
    assert len(items) == 6 and all(len(it) > 0 for it in items)
    assert [it.label for it in items] == list(data.train.labels[:6])
    batch = method.collate(items)
    assert batch["input_ids"].shape[0] == 6 and batch["attention_mask"].shape == batch["input_ids"].shape

    trainable = method.trainable_parameters()
    if method.trains:
        loss = method.loss(batch)
        assert loss.ndim == 0 and torch.isfinite(loss)
        loss.backward()
        assert trainable and any(p.grad is not None and p.grad.abs().sum() > 0 for _, p in trainable)
    else:
        assert trainable == []  # the baseline changes no weight

    test = method.encode(data.test.texts, data.test.labels)
    probs = method.predict_proba(test, batch_size=4)
    assert probs.shape == (len(data.test), n_labels)
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-6)
    np.testing.assert_allclose(method.predict_proba(test, batch_size=len(test)), probs, atol=1e-5)  # batch-size free

    folder = tmp_path / "model"
    method.save(folder)
    exported = _reload(kind, folder)
    assert list(exported.label_names) == list(data.label_names)
    np.testing.assert_allclose(exported.predict_proba(list(data.test.texts)), probs, atol=1e-5)

    facts = method.describe()
    assert facts["kind"] == kind
