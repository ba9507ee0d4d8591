"""Prompt templates and label words for the `next_token` and `prompt` methods.

Templates. `method.template` is plain text with placeholders: `{text}` and an optional
`{demos}`; a pair task (`task.text: [question, reply]`) also names each part by its own column,
`{question}` and `{reply}` (its `{text}` is both parts, one per line). `method.demo_template` may
also use `{label}`. `{{` and `}}` stand for literal braces. The renderer is our own and never calls
`str.format`: a placeholder is a bare name from that short list, with no attribute or index
access (`{text.x}`, `{text[0]}`), no conversion (`{text!r}`) and no format spec (`{text:>9}`).
Anything else is a config error naming the key.

Label words. `method.label_words` maps every label to one word or a list of words; null uses the
label names with '_' read as a space. Each word is tokenised *in context*: we encode the
template's closing literal text plus the word, check that the closing text's own tokens are a
prefix of the result, and keep the suffix. The prompt is tokenised once and shared by every
label, so a label's tokens must begin on a token boundary the prompt already has; when the word
would fuse with the template's last characters (the prefix check fails, e.g. a template ending
in a space under byte-level BPE, where ' ' and 'word' become the one token ' word'), the word is
encoded alone instead. Either way the same ids are used in training and in scoring, and
`LabelTokens.describe()` records them.

Leading space (`method.space_prefix`). Byte-level BPE tokenizers (GPT-2, Llama 3 style) spell a
word differently after a space ('x' and ' x' get different ids). With `auto`, such a tokenizer
gets a space before every label word when the template ends without whitespace, so
"Category:" + "refund" is scored as "Category: refund", the way such text was written in
pretraining; `always` and `never` force the choice. Tokenizers for which 'x' and ' x' encode
alike (WordPiece, "▁"-marking SentencePiece) need no prefix and get none under `auto`.
"""

from __future__ import annotations

import string
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from harness.errors import HarnessError, SettingError

__all__ = [
    "ChatFrame",
    "LabelTokens",
    "PromptBuilder",
    "Template",
    "chat_frame",
    "encode_in_context",
    "is_space_sensitive",
    "parse_template",
    "resolve_label_words",
    "special_tokens_around",
    "text_fields",
    "tokenize_label_words",
    "wants_space",
]

_RESERVED = ("text", "demos", "label")


@dataclass(frozen=True)
class Template:
    """A parsed template: literal pieces and placeholder names, alternating."""

    source: str
    key: str  # config key, for messages
    pieces: tuple[tuple[str, str | None], ...]  # (literal, field or None)

    @property
    def fields(self) -> frozenset[str]:
        return frozenset(f for _, f in self.pieces if f is not None)

    @property
    def tail(self) -> str:
        """The literal text after the last placeholder (what the label words follow)."""
        return self.pieces[-1][0]  # parse_template always ends with a literal piece

    def render(self, values: Mapping[str, str]) -> str:
        """Substitute the placeholders; values are inserted verbatim (never re-parsed)."""
        parts: list[str] = []
        for literal, name in self.pieces:
            parts.append(literal)
            if name is not None:
                parts.append(values[name])
        return "".join(parts)


def parse_template(source: str, *, key: str, allowed: Sequence[str]) -> Template:
    """Parse `source`, allowing only bare placeholders from `allowed`; HarnessError naming `key` otherwise."""
    if not source.strip():
        raise SettingError(key, "the template is empty; write a prompt such as 'Message: {text}\\nCategory:'")
    pieces: list[tuple[str, str | None]] = []
    try:
        parsed = list(string.Formatter().parse(source))
    except ValueError as exc:  # unmatched braces
        raise SettingError(key, f"{exc}; write literal braces as '{{{{' and '}}}}'") from None
    names = ", ".join("{" + a + "}" for a in allowed)
    for literal, name, spec, conversion in parsed:
        if name is None:
            pieces.append((literal, None))
            continue
        shown = "{" + name + (f"!{conversion}" if conversion else "") + (f":{spec}" if spec else "") + "}"
        if conversion or spec or name not in allowed:
            raise SettingError(
                key, f"placeholder {shown} is not allowed; use only {names} "
                "(no attribute, index, conversion or format spec), and '{{'/'}}' for literal braces"
            )
        pieces.append((literal, name))
    if not pieces or pieces[-1][1] is not None:
        pieces.append(("", None))  # keeps `tail` simple: the last piece is always a literal
    return Template(source, key, tuple(pieces))


def text_fields(task_text: str | Sequence[str]) -> tuple[str, ...]:
    """The placeholders that carry an example's text: ("text",), or ("text", COLUMN_A, COLUMN_B) for a
    pair task, each part named by its own column (`task.text: [question, reply]` -> {question}, {reply})."""
    if isinstance(task_text, str):
        return ("text",)
    for column in task_text:
        if not column.isidentifier() or column in _RESERVED:
            why = "is reserved" if column in _RESERVED else "is not a plain name (letters, digits, '_')"
            raise SettingError("task.text", f"column {column!r} {why}, so a template cannot name it as "
                                            f"{{{column}}}; rename the column in the data files, or use {{text}}")
    return ("text", *task_text)


def _shown(names: Sequence[str]) -> str:
    return ", ".join("{" + n + "}" for n in names)


def check_text_fields(template: Template, fields: Sequence[str]) -> None:
    """A task template must place the example's text: {text}, or both columns' placeholders of a pair."""
    used = template.fields
    if len(fields) == 3:
        if "text" not in used and not set(fields[1:]) <= used:
            raise SettingError(template.key, f"a pair task needs {_shown(fields[1:])} (or {{text}}) in the template")
    elif "text" not in used:
        raise SettingError(template.key, "the template has no {text} placeholder")


def text_values(text: str | tuple[str, str], fields: Sequence[str]) -> dict[str, str]:
    """Placeholder values for one example; a pair also fills {text} with both parts, one per line."""
    if isinstance(text, tuple):
        return {"text": f"{text[0]}\n{text[1]}", fields[1]: text[0], fields[2]: text[1]}
    return {"text": text}


def resolve_label_words(label_words: Mapping[str, Any] | None, label_names: Sequence[str]) -> list[tuple[str, ...]]:
    """The words of every label, in label order; errors name `method.label_words`."""
    if label_words is None:
        return [(name.replace("_", " "),) for name in label_names]
    unknown = [k for k in label_words if k not in label_names]
    if unknown:
        raise SettingError(f"method.label_words.{unknown[0]}", f"label {unknown[0]!r} does not occur in the data; "
                           f"the labels are {', '.join(label_names)}")
    out: list[tuple[str, ...]] = []
    for name in label_names:
        value = label_words.get(name)
        words = (value,) if isinstance(value, str) else tuple(value or ())
        if not words or any(not isinstance(w, str) or not w.strip() for w in words):
            raise SettingError("method.label_words", f"label {name!r} has no words; add '{name}: <word>' (or a list)")
        out.append(words)
    return out


def is_space_sensitive(tokenizer: Any) -> bool:
    """True when 'x' and ' x' encode differently (byte-level BPE and similar)."""
    return bool(tokenizer.encode("x", add_special_tokens=False) != tokenizer.encode(" x", add_special_tokens=False))


def wants_space(mode: str, tail: str, tokenizer: Any) -> bool:
    """Whether label words get a leading space (see the module docstring)."""
    if mode == "always":
        return True
    if mode == "never":
        return False
    return is_space_sensitive(tokenizer) and not (tail and tail[-1].isspace())


def encode_in_context(tokenizer: Any, context: str, word: str) -> tuple[tuple[int, ...], bool]:
    """Token ids of `word` as it is tokenised after `context`; (ids, True) if in context, else (alone, False)."""
    ctx = tokenizer.encode(context, add_special_tokens=False) if context else []
    if ctx:
        both = tokenizer.encode(context + word, add_special_tokens=False)
        if len(both) > len(ctx) and both[: len(ctx)] == ctx:
            return tuple(both[len(ctx):]), True
    return tuple(tokenizer.encode(word, add_special_tokens=False)), False


def special_tokens_around(tokenizer: Any) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """The special ids the tokenizer puts before and after a text (e.g. (bos,), () or (), (eos,))."""
    plain = tokenizer.encode("x", add_special_tokens=False)
    full = tokenizer.encode("x", add_special_tokens=True)
    for start in range(len(full) - len(plain) + 1):
        if full[start : start + len(plain)] == plain:
            return tuple(full[:start]), tuple(full[start + len(plain):])
    return (), ()


_CHAT_SLOT = "\x00prompt\x00"  # stands for the prompt when the chat template is rendered once to find its tail


@dataclass(frozen=True)
class ChatFrame:
    """The tokenizer's chat template around a prompt: one user message, then the assistant turn start.

    `wrap` renders the chat template itself for every prompt (so the ids are exactly what
    `apply_chat_template(..., add_generation_prompt=True)` gives); `tail` is what the template puts
    after the user's text, which is what the label words follow.
    """

    wrap: Callable[[str], str]
    tail: str


def chat_frame(tokenizer: Any, mode: str, checkpoint: str) -> ChatFrame | None:
    """The chat framing `method.chat` asks for, or None; `always` without a chat template is a SettingError."""
    has = bool(getattr(tokenizer, "chat_template", None))
    if mode == "never" or (mode == "auto" and not has):
        return None
    if not has:
        raise SettingError("method.chat", f"'always', but the tokenizer of {checkpoint} has no chat template; "
                           "use 'auto' or 'never', or a checkpoint that ships one")

    def wrap(prompt: str) -> str:
        text = tokenizer.apply_chat_template([{"role": "user", "content": prompt}], add_generation_prompt=True,
                                             tokenize=False)
        return str(text)

    framed = wrap(_CHAT_SLOT)
    if framed.count(_CHAT_SLOT) != 1:
        raise SettingError("method.chat", f"the chat template of {checkpoint} does not place the user's message "
                           "verbatim once; use 'never'")
    return ChatFrame(wrap, framed.split(_CHAT_SLOT)[1])


@dataclass(frozen=True)
class LabelTokens:
    """Token ids of every word of every label: `words[k][j]` is word j of label k."""

    words: tuple[tuple[str, ...], ...]
    ids: tuple[tuple[tuple[int, ...], ...], ...]
    in_context: tuple[tuple[bool, ...], ...]
    space: bool

    def variants(self, multi_word: str) -> tuple[list[tuple[int, ...]], list[int]]:
        """Flat (token ids, label index) lists of the sequences to score."""
        seqs: list[tuple[int, ...]] = []
        owner: list[int] = []
        for k, per_label in enumerate(self.ids):
            for ids in per_label[: 1 if multi_word == "first" else None]:
                seqs.append(ids)
                owner.append(k)
        return seqs, owner

    @property
    def longest(self) -> int:
        return max(len(ids) for per_label in self.ids for ids in per_label)

    def describe(self, label_names: Sequence[str], tokenizer: Any) -> dict[str, Any]:
        return {
            name: [
                {"word": w, "token_ids": list(ids), "tokens": tokenizer.convert_ids_to_tokens(list(ids)),
                 "in_context": ctx}
                for w, ids, ctx in zip(self.words[k], self.ids[k], self.in_context[k], strict=True)
            ]
            for k, name in enumerate(label_names)
        }


def tokenize_label_words(
    tokenizer: Any, words: Sequence[tuple[str, ...]], label_names: Sequence[str], *, context: str,
    space: bool, end_ids: tuple[int, ...] = (),
) -> LabelTokens:
    """Tokenise every label word after `context`; two labels with one token sequence are an error."""
    ids: list[tuple[tuple[int, ...], ...]] = []
    flags: list[tuple[bool, ...]] = []
    seen: dict[tuple[int, ...], str] = {}
    for name, per_label in zip(label_names, words, strict=True):
        row, row_flags = [], []
        for word in per_label:
            spelled = (" " + word.lstrip()) if space else word
            seq, ok = encode_in_context(tokenizer, context, spelled)
            seq = seq + end_ids
            if not seq:
                raise SettingError("method.label_words", f"word {word!r} of label {name!r} encodes to no tokens")
            other = seen.get(seq)
            if other is not None and other != name:
                raise SettingError("method.label_words", f"labels {other!r} and {name!r} have words with the same "
                                   f"tokens {list(seq)}; give them different words")
            seen[seq] = name
            row.append(seq)
            row_flags.append(ok)
        ids.append(tuple(row))
        flags.append(tuple(row_flags))
    return LabelTokens(tuple(words), tuple(ids), tuple(flags), space)


class PromptBuilder:
    """Renders an example's prompt and truncates its *text* (never the template) to a token limit."""

    def __init__(self, template: Template, tokenizer: Any, *, limit: int, lead: tuple[int, ...],
                 trail: tuple[int, ...], limit_key: str, fields: Sequence[str] = ("text",),
                 chat: ChatFrame | None = None) -> None:
        self.template, self.tokenizer, self.fields = template, tokenizer, tuple(fields)
        self.chat = chat
        # a chat template writes its own special tokens (begin of text, turn markers)
        self.limit, self.lead, self.trail = limit, (() if chat else lead), (() if chat else trail)
        empty = self.ids(dict.fromkeys(self.fields, ""), "")
        if len(empty) >= limit:
            raise HarnessError(
                f"{template.key}: the template alone{' (in the chat framing of method.chat)' if chat else ''} takes "
                f"{len(empty)} tokens, leaving no room for text within "
                f"the {limit} tokens {limit_key} allows (after the label words); shorten it or raise {limit_key}"
            )

    def ids(self, values: Mapping[str, str], demos: str) -> tuple[int, ...]:
        text = self.template.render({**values, "demos": demos})
        if self.chat is not None:
            text = self.chat.wrap(text)
        # verbose=False: a long text is measured here and cut below, so the library's "longer than the
        # maximum ... indexing errors" warning would not be true
        return self.lead + tuple(self.tokenizer.encode(text, add_special_tokens=False, verbose=False)) + self.trail

    def build(self, text: str | tuple[str, str], demos: str = "", extra_limit: int = 0) -> tuple[int, ...]:
        """Prompt ids of one example, at most `limit + extra_limit` long; the longer text is cut first."""
        parts = list(text) if isinstance(text, tuple) else [text]
        limit = self.limit + extra_limit
        for _ in range(20):  # each round removes the measured overflow; BPE boundaries may need a second
            values = text_values((parts[0], parts[1]) if len(parts) == 2 else parts[0], self.fields)
            ids = self.ids(values, demos)
            over = len(ids) - limit
            if over <= 0:
                return ids
            longest = max(range(len(parts)), key=lambda i: len(parts[i]))
            parts[longest] = self._cut(parts[longest], over)
        raise SettingError(self.template.key, f"could not fit a prompt into {limit} tokens")  # pragma: no cover

    def _cut(self, text: str, tokens: int) -> str:
        """`text` without its last `tokens` tokens, cut at a character offset so no byte is split."""
        enc = self.tokenizer(text, add_special_tokens=False, return_offsets_mapping=True, verbose=False)
        offsets = enc["offset_mapping"]
        keep = max(len(offsets) - tokens, 0)
        return text[: offsets[keep - 1][1]] if keep else ""
