"""Shared pytest fixtures.

- Every test session gets its own cache folder ($HARNESS_CACHE), so tests never write to ~/.cache.
- `toy_paths`: kind -> folder of a tiny offline checkpoint (see harness.models.toy), built once per session.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest

os.environ.setdefault("HF_HUB_OFFLINE", "1")  # no model hub at run time; set before transformers is imported


@pytest.fixture(scope="session", autouse=True)
def harness_cache(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A session-wide empty cache folder, exported as $HARNESS_CACHE."""
    cache = tmp_path_factory.mktemp("harness-cache")
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("HARNESS_CACHE", str(cache))
        yield cache


@pytest.fixture(scope="session")
def toy_paths(harness_cache: Path) -> dict[str, Path]:
    """{"encoder": ..., "decoder": ..., "encoder-decoder": ...}: toy checkpoints (seed 0), built once.

    Load them with the transformers auto classes, e.g. AutoModelForSequenceClassification.from_pretrained(
    toy_paths["encoder"], num_labels=3) and AutoTokenizer.from_pretrained(toy_paths["encoder"]).
    """
    from harness.models.toy import TOY_KINDS, ensure_toy

    return {kind: ensure_toy(kind, seed=0, cache_dir=harness_cache) for kind in TOY_KINDS}
