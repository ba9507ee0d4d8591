"""Templates, label words, the leading-space rule and truncation (harness/templates.py)."""

from __future__ import annotations

from pathlib import Path

import pytest
from transformers import AutoTokenizer

from harness.errors import HarnessError
from harness.methods.templates import (
    PromptBuilder,
    check_text_fields,
    encode_in_context,
    is_space_sensitive,
    parse_template,
    resolve_label_words,
    text_fields,
    text_values,
    tokenize_label_words,
    wants_space,
)

TASK_FIELDS = ("text", "demos")
PAIR = ("text", "question", "reply")  # text_fields(["question", "reply"]): the reply task's columns
PAIR_FIELDS = (*PAIR, "demos")


@pytest.fixture(scope="module")
def gpt_tok(toy_paths: dict[str, Path]):
    return AutoTokenizer.from_pretrained(toy_paths["decoder"])


@pytest.fixture(scope="module")
def t5_tok(toy_paths: dict[str, Path]):
    return AutoTokenizer.from_pretrained(toy_paths["encoder-decoder"])


@pytest.mark.parametrize("bad", ["{text.__class__}", "{text[0]}", "{other}", "{text!r}", "{text:>20}", "{}", "{0}",
                                 "{text.__init__.__globals__}"])
def test_injection_and_unknown_placeholders_are_config_errors(bad: str) -> None:
    # Attribute/index access in str.format templates reaches object internals (Python docs, "Format String
    # Syntax": field_name may be followed by .attr or [index]); the renderer must refuse them.
    with pytest.raises(HarnessError, match=r"method\.template.*not allowed"):
        parse_template(f"Message: {bad}\nCategory:", key="method.template", allowed=TASK_FIELDS)


@pytest.mark.parametrize("source", ["", "   \n"])
def test_empty_template_is_an_error(source: str) -> None:
    with pytest.raises(HarnessError, match=r"method\.template: the template is empty"):
        parse_template(source, key="method.template", allowed=TASK_FIELDS)


def test_unmatched_brace_is_an_error() -> None:
    with pytest.raises(HarnessError, match=r"method\.template"):
        parse_template("Message: {text\nCategory:", key="method.template", allowed=TASK_FIELDS)


def test_render_matches_str_format_for_safe_templates() -> None:
    # Reference: Python's own str.format on a template that uses only bare names and {{ }} escapes.
    source = "{demos}Q {{json}}: {text} -> {{ok}}}}\nA:"
    values = {"demos": "x {text} y\n", "text": "a {demos} b"}  # braces in values stay literal, never re-parsed
    t = parse_template(source, key="method.template", allowed=TASK_FIELDS)
    assert t.render(values) == source.format(**values)
    assert t.tail == "\nA:"
    assert t.fields == {"demos", "text"}


def test_template_needs_its_text_placeholder() -> None:
    t = parse_template("{demos}Category:", key="method.template", allowed=TASK_FIELDS)
    with pytest.raises(HarnessError, match=r"method\.template: the template has no \{text\}"):
        check_text_fields(t, ("text",))
    pair = parse_template("A: {question}\nB: {reply}\nSame?", key="method.template", allowed=PAIR_FIELDS)
    check_text_fields(pair, PAIR)
    check_text_fields(parse_template("{text}\nSame?", key="method.template", allowed=PAIR_FIELDS), PAIR)
    with pytest.raises(HarnessError, match=r"a pair task needs \{question\}, \{reply\} \(or \{text\}\)"):
        check_text_fields(parse_template("A: {question}?", key="method.template", allowed=PAIR_FIELDS), PAIR)
    # a single-text task knows no column placeholders: the error lists the ones it allows
    with pytest.raises(HarnessError, match=r"placeholder \{question\} is not allowed; use only \{text\}, \{demos\}"):
        parse_template("A: {question}", key="method.template", allowed=TASK_FIELDS)


@pytest.mark.parametrize("columns, fields", [
    ("text", ("text",)), ("body", ("text",)), (("question", "reply"), ("text", "question", "reply")),
    (("q_1", "answer"), ("text", "q_1", "answer")),
])
def test_text_fields_name_a_pair_by_its_columns(columns, fields) -> None:
    assert text_fields(columns) == fields
    values = text_values(("Is it down?", "Restart it."), fields) if len(fields) == 3 else text_values("hi", fields)
    assert set(values) == set(fields)
    if len(fields) == 3:
        assert values["text"] == "Is it down?\nRestart it." and values[fields[1]] == "Is it down?"


@pytest.mark.parametrize("columns, why", [(("customer question", "reply"), "not a plain name"),
                                          (("text", "reply"), "reserved"), (("label", "reply"), "reserved")])
def test_pair_columns_that_cannot_be_placeholders_are_refused(columns, why) -> None:
    with pytest.raises(HarnessError, match=rf"task\.text: column '{columns[0]}' .*{why}.*rename the column"):
        text_fields(columns)


def test_label_words_default_and_errors() -> None:
    names = ["lost_item", "refund"]
    assert resolve_label_words(None, names) == [("lost item",), ("refund",)]
    assert resolve_label_words({"lost_item": ["lost", "missing"], "refund": "money"}, names) == [
        ("lost", "missing"), ("money",)]
    with pytest.raises(HarnessError, match=r"method\.label_words\.praise: label 'praise' does not occur"):
        resolve_label_words({"lost_item": "lost", "refund": "money", "praise": "thanks"}, names)
    with pytest.raises(HarnessError, match=r"method\.label_words: label 'refund' has no words"):
        resolve_label_words({"lost_item": "lost"}, names)
    with pytest.raises(HarnessError, match=r"label 'refund' has no words"):
        resolve_label_words({"lost_item": "lost", "refund": []}, names)


def test_space_sensitivity_by_tokenizer(toy_paths: dict[str, Path], gpt_tok, t5_tok) -> None:
    # Common practice: GPT-2's byte-level BPE folds the preceding space into the token ('Ġword'); WordPiece and
    # SentencePiece-style "▁" marking with prepend_scheme=always encode 'x' and ' x' alike.
    assert is_space_sensitive(gpt_tok)
    assert not is_space_sensitive(t5_tok)
    assert not is_space_sensitive(AutoTokenizer.from_pretrained(toy_paths["encoder"]))
    assert wants_space("auto", "\nCategory:", gpt_tok)
    assert not wants_space("auto", "\nCategory: ", gpt_tok)
    assert not wants_space("auto", "\nCategory:", t5_tok)
    assert wants_space("always", "x ", t5_tok) and not wants_space("never", ":", gpt_tok)


def test_label_ids_are_the_tokenizers_own_encoding_in_context(gpt_tok) -> None:
    # Reference: the tokenizer's own encoding of the joined text "…Category: refund".
    words = [("refund",), ("lost item",)]
    lt = tokenize_label_words(gpt_tok, words, ["refund", "lost_item"], context="\nCategory:", space=True)
    prompt = "Message: my bag is gone\nCategory:"
    for k, word in enumerate(["refund", "lost item"]):
        joined = gpt_tok.encode(prompt + " " + word, add_special_tokens=False)
        assert list(gpt_tok.encode(prompt, add_special_tokens=False)) + list(lt.ids[k][0]) == joined
        assert lt.in_context[k] == (True,)
    assert gpt_tok.convert_ids_to_tokens(list(lt.ids[0][0]))[0].startswith("Ġ")  # the space is in the token


def test_fallback_when_the_word_fuses_with_the_template_end(gpt_tok) -> None:
    # "Category: " + "refund": byte-level BPE joins the trailing space and the word into ' refund', so the
    # context's own tokens are no prefix of the joined encoding; the word is then encoded alone.
    ctx_ids = gpt_tok.encode("\nCategory: ", add_special_tokens=False)
    joined = gpt_tok.encode("\nCategory: refund", add_special_tokens=False)
    assert joined[: len(ctx_ids)] != ctx_ids  # the premise of the fallback
    ids, in_context = encode_in_context(gpt_tok, "\nCategory: ", "refund")
    assert not in_context and list(ids) == gpt_tok.encode("refund", add_special_tokens=False)


def test_identical_label_token_sequences_are_an_error(gpt_tok) -> None:
    with pytest.raises(HarnessError, match=r"method\.label_words: labels 'a' and 'b' have words with the same tokens"):
        tokenize_label_words(gpt_tok, [("refund",), (" refund",)], ["a", "b"], context=":", space=True)
    with pytest.raises(HarnessError, match="same tokens"):
        tokenize_label_words(gpt_tok, [("late", "refund"), ("refund",)], ["a", "b"], context=":", space=True)


def test_truncation_cuts_the_text_and_keeps_the_template_tail(gpt_tok) -> None:
    t = parse_template("{demos}Message: {text}\nCategory:", key="method.template", allowed=TASK_FIELDS)
    builder = PromptBuilder(t, gpt_tok, limit=24, lead=(), trail=(), limit_key="train.max_length")
    text = "The ferry to the island was two hours late again and nobody told us anything at all " * 3
    ids = builder.build(text)
    assert len(ids) <= 24
    decoded = gpt_tok.decode(list(ids))
    assert decoded.startswith("Message: The ferry to") and decoded.endswith("\nCategory:")
    assert decoded[len("Message: "): -len("\nCategory:")] in text  # a prefix of the text survived
    short = builder.build("Hello")
    assert gpt_tok.decode(list(short)) == "Message: Hello\nCategory:"


def test_pair_truncation_cuts_the_longer_text_first(gpt_tok) -> None:
    t = parse_template("Q: {question}\nA: {reply}\nOK?", key="method.template", allowed=PAIR_FIELDS)
    builder = PromptBuilder(t, gpt_tok, limit=30, lead=(), trail=(), limit_key="train.max_length", fields=PAIR)
    question, reply = "Is the router broken?", "Please restart the router and wait for the lights. " * 5
    decoded = gpt_tok.decode(list(builder.build((question, reply))))
    assert decoded.startswith(f"Q: {question}\nA: Please restart") and decoded.endswith("\nOK?")


def test_template_that_overflows_before_any_text_is_an_error(gpt_tok) -> None:
    long = "Read the passenger message below very carefully and decide which category fits it best. " * 3
    t = parse_template(long + "{text}\nCategory:", key="method.template", allowed=TASK_FIELDS)
    with pytest.raises(HarnessError, match=r"method\.template: the template alone takes \d+ tokens.*train\.max_length"):
        PromptBuilder(t, gpt_tok, limit=20, lead=(), trail=(), limit_key="train.max_length")
