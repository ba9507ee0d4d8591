"""Tokenised splits cached on disk, shared by every run (and sweep) that would tokenise them the same way.

A cache file is `<cache>/tokens/<key>.json`, where the key is the SHA-256 of the tokenizer's
fingerprint, the split's content hash, max_length and the method's own encoding parameters (a
rendered template, label words...). Anything that changes the tokens changes the key, so a stale
file is never read; the cache folder is $HARNESS_CACHE, else ~/.cache/harness.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from harness.files import atomic_write_text, cache_dir
from harness.methods.registry import Encoded

__all__ = ["cache_key", "cached_encode", "tokens_dir", "tokenizer_fingerprint"]

_FORMAT = 1  # bump when the file layout changes


def tokens_dir() -> Path:
    """`<cache>/tokens`, with the cache folder from $HARNESS_CACHE or ~/.cache/harness."""
    return cache_dir() / "tokens"


def tokenizer_fingerprint(tokenizer: Any) -> str:
    """SHA-256 of everything that decides the tokens: vocabulary, merges, normaliser, added and special tokens."""
    h = hashlib.sha256(type(tokenizer).__name__.encode())
    backend = getattr(tokenizer, "backend_tokenizer", None)
    if backend is not None:
        # The whole fast-tokenizer definition, as tokenizer.json holds it, less the truncation and padding
        # settings that every call with truncation=... rewrites.
        definition = json.loads(backend.to_str())
        definition.pop("truncation", None)
        definition.pop("padding", None)
        h.update(json.dumps(definition, sort_keys=True).encode("utf-8"))
    else:
        h.update(json.dumps(sorted(tokenizer.get_vocab().items())).encode("utf-8"))
    extra = {
        "special": {k: str(v) for k, v in sorted(tokenizer.special_tokens_map.items())},
        "added": sorted(str(t) for t in tokenizer.get_added_vocab()),
        "lower": getattr(tokenizer, "do_lower_case", None),
        "bos": getattr(tokenizer, "add_bos_token", None), "eos": getattr(tokenizer, "add_eos_token", None),
        "truncation_side": getattr(tokenizer, "truncation_side", None),
    }
    h.update(json.dumps(extra, sort_keys=True).encode("utf-8"))
    return h.hexdigest()


def cache_key(tokenizer_fp: str, data_hash: str, max_length: int, params: dict[str, Any]) -> str:
    """The file name stem for one tokenised split."""
    blob = json.dumps([_FORMAT, tokenizer_fp, data_hash, max_length, params], sort_keys=True, default=str)
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()


def _to_json(items: Sequence[Encoded]) -> str:
    rows = [[list(it.input_ids), it.label, _plain(it.extra)] for it in items]
    return json.dumps({"format": _FORMAT, "rows": rows}, separators=(",", ":"))


def _plain(extra: dict[str, Any] | None) -> dict[str, Any] | None:
    if extra is None:
        return None
    return {k: list(v) if isinstance(v, tuple) else v for k, v in extra.items()}


def _from_json(text: str) -> list[Encoded] | None:
    try:
        data = json.loads(text)
    except json.JSONDecodeError:
        return None  # a damaged file is re-tokenised, never trusted
    if not isinstance(data, dict) or data.get("format") != _FORMAT:
        return None
    out = []
    for ids, label, extra in data["rows"]:
        frozen = None if extra is None else {k: tuple(v) if isinstance(v, list) else v for k, v in extra.items()}
        out.append(Encoded(tuple(ids), int(label), frozen))
    return out


def cached_encode(key: str, count: int, encode: Callable[[], list[Encoded]],
                  folder: Path | None = None) -> tuple[list[Encoded], bool]:
    """The cached encoding under `key` if it holds `count` rows, else `encode()` written to the cache.

    Returns (items, hit).
    """
    path = (folder or tokens_dir()) / f"{key}.json"
    if path.exists():
        items = _from_json(path.read_text(encoding="utf-8"))
        if items is not None and len(items) == count:
            return items, True
    items = encode()
    atomic_write_text(path, _to_json(items))  # concurrent sweep runs write the same bytes; last rename wins
    return items, False
