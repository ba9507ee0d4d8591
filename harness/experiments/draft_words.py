"""Label words for a starter config: short, distinct, preferably one token each, found from the label names.

Candidates for a label are the words of its name, lower-cased, in order (`lost_item` -> `lost`,
`item`; "Billing Question" -> `billing`, `question`), skipping filler words ("the", "of", "does")
and any word that occurs in another label's name too (it would not tell the two apart), then the
whole name lower-cased as the fallback. Each candidate is tokenised *in context*, after the text
the label words will follow, with the decoder's tokenizer, exactly as `tokenize_label_words` does
for a run. Labels are served in order of fewest single-token options first; each takes its first
single-token candidate not yet taken, else its first longer one. Two labels that end up with the
same token sequence are an error naming both.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from harness.errors import HarnessError, SettingError
from harness.methods.templates import encode_in_context, tokenize_label_words

__all__ = ["WordChoice", "choose_label_words", "name_words"]

_FILLER = frozenset({"a", "an", "the", "of", "to", "for", "and", "or", "in", "on", "at", "by", "with", "is", "are",
                     "was", "be", "does", "do", "did", "has", "have", "it", "its"})
_SPLIT = re.compile(r"[^\w]+|_+")


@dataclass(frozen=True)
class WordChoice:
    """The word chosen for one label, its token count in context, and the candidates it was chosen from."""

    label: str
    word: str
    tokens: int
    candidates: tuple[str, ...]


def name_words(name: str) -> list[str]:
    """The lower-cased words of a label name: split at spaces, punctuation and '_'."""
    return [w for w in _SPLIT.split(name.lower()) if w]


def _candidates(name: str, shared: set[str]) -> list[str]:
    words = name_words(name)
    out = [w for w in words if w not in _FILLER and w not in shared]
    full = " ".join(words) or name.strip().lower()
    if full and full not in out:
        out.append(full)
    return list(dict.fromkeys(out))


def choose_label_words(label_names: Sequence[str], tokenizer: Any, *, context: str, space: bool,
                       source: str) -> list[WordChoice]:
    """One word per label (see the module docstring); HarnessError naming the labels that cannot be told apart."""
    counts = Counter(w for name in label_names for w in set(name_words(name)))
    shared = {w for w, n in counts.items() if n > 1}
    options: dict[str, list[tuple[str, tuple[int, ...]]]] = {}
    for name in label_names:
        seen: list[tuple[str, tuple[int, ...]]] = []
        for word in _candidates(name, shared):
            ids, _ = encode_in_context(tokenizer, context, (" " + word) if space else word)
            if ids:
                seen.append((word, ids))
        options[name] = seen
    order = sorted(label_names, key=lambda n: (sum(len(ids) == 1 for _, ids in options[n]), label_names.index(n)))
    taken: dict[tuple[int, ...], str] = {}
    chosen: dict[str, WordChoice] = {}
    for name in order:
        ranked = sorted(options[name], key=lambda o: len(o[1]) > 1)  # stable: single tokens first, name order kept
        free = [o for o in ranked if o[1] not in taken]
        if not free:
            other = taken.get(ranked[0][1]) if ranked else None
            with_whom = f" and {other!r}" if other else ""
            raise HarnessError(
                f"{source}: labels {name!r}{with_whom} cannot be given distinct label words (their names reduce to the "
                "same lower-case words); rename one of them in the label column"
            )
        word, ids = free[0]
        taken[ids] = name
        chosen[name] = WordChoice(name, word, len(ids), tuple(w for w, _ in options[name]))
    result = [chosen[name] for name in label_names]
    try:  # the check a run makes, so the written words are known to load
        tokenize_label_words(tokenizer, [(c.word,) for c in result], label_names, context=context, space=space)
    except SettingError as exc:  # pragma: no cover - the search above already keeps sequences apart
        raise HarnessError(f"{source}: {exc.problem}") from None
    return result
