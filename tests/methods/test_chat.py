"""`method.chat`: prompts wrapped in the checkpoint's chat template (harness/methods/templates.py, next_token.py)."""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import pytest
from transformers import AutoTokenizer

from harness.config import Config, config_from_dict
from harness.data.task import Split, TaskData
from harness.errors import SettingError
from harness.methods.next_token import NextTokenMethod
from harness.methods.prompt import PromptMethod
from harness.methods.templates import encode_in_context

NAMES = ["lost_item", "praise", "refund"]
TEXTS = ["left my blue bag on the 9.15 sailing from the north pier, it has my keys in it", "the crew were lovely",
         "I want my money back for the cancelled crossing"]
TEMPLATE = "Message: {text}\nTopic (lost, praise, refund):"
WORDS = {"lost_item": "lost", "praise": "praise", "refund": "refund"}
# A small chat template in the shape instruction-tuned decoders ship (ChatML-like turn markers, a system
# turn, and the assistant turn start when add_generation_prompt is set); invented for this test.
CHAT_TEMPLATE = (
    "{{ '<|im_start|>system\\nYou sort ferry messages.<|im_end|>\\n' }}"
    "{% for message in messages %}{{ '<|im_start|>' + message['role'] + '\\n' + message['content'] + '<|im_end|>\\n' }}"
    "{% endfor %}{% if add_generation_prompt %}{{ '<|im_start|>assistant\\n' }}{% endif %}"
)


@pytest.fixture(scope="module")
def chat_decoder(toy_paths: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The toy decoder with a chat template added to its tokenizer."""
    folder = tmp_path_factory.mktemp("chat") / "decoder"
    shutil.copytree(toy_paths["decoder"], folder)
    tok = AutoTokenizer.from_pretrained(folder)
    tok.chat_template = CHAT_TEMPLATE
    tok.save_pretrained(folder)
    return folder


def make(checkpoint: Path, kind: str = "next_token", max_length: int = 128, **method: Any) -> NextTokenMethod:
    cfg: Config = config_from_dict({
        "task": {"name": "t", "train": "unused.csv"}, "model": {"checkpoint": str(checkpoint)},
        "method": {"kind": kind, "template": TEMPLATE, "label_words": WORDS, **method},
        "train": {"max_length": max_length}})
    split = Split("train", ("a", "b", "c"), tuple(TEXTS), (0, 1, 2))
    data = TaskData(split, split, split, tuple(NAMES), False)
    return (PromptMethod if kind == "prompt" else NextTokenMethod)(cfg=cfg, data=data)


def _reference(tok: Any, text: str) -> list[int]:
    messages = [{"role": "user", "content": TEMPLATE.replace("{text}", text)}]
    # the library's own rendering and tokenisation (transformers PreTrainedTokenizerBase.apply_chat_template)
    return list(tok.apply_chat_template(messages, add_generation_prompt=True, tokenize=True, return_dict=False))


@pytest.mark.parametrize("kind", ["next_token", "prompt"])
def test_prompt_ids_equal_the_tokenizers_own_chat_rendering(chat_decoder: Path, kind: str) -> None:
    m = make(chat_decoder, kind, chat="always")
    items = m.encode(TEXTS, [-1, -1, -1])
    for item, text in zip(items, TEXTS, strict=True):
        assert list(item.input_ids) == _reference(m.tokenizer, text)
    assert m.describe()["chat"] is True


def test_label_words_follow_the_assistant_turn_start(chat_decoder: Path) -> None:
    m = make(chat_decoder, chat="always")
    assert m.chat is not None and m.chat.tail == "<|im_end|>\n<|im_start|>assistant\n"
    for k, name in enumerate(NAMES):
        # the tail ends in a newline, so no space is put before the word (space_prefix: auto)
        assert m.labels.ids[k][0] == encode_in_context(m.tokenizer, m.chat.tail, WORDS[name])[0]
    gold = m.encode([TEXTS[2]], [2])[0]
    assert list(gold.input_ids) == _reference(m.tokenizer, TEXTS[2]) + list(m.labels.ids[2][0])


def test_truncation_cuts_the_text_never_the_chat_framing(chat_decoder: Path) -> None:
    m = make(chat_decoder, chat="always", max_length=160)
    long = " ".join(["the ferry was late and nobody told us anything at the pier"] * 20)
    ids = m.encode([long], [-1])[0].input_ids
    assert len(ids) == 160 - m.labels.longest
    shown = m.tokenizer.decode(list(ids), skip_special_tokens=False)
    assert shown.startswith("<|im_start|>system\nYou sort ferry messages.<|im_end|>\n<|im_start|>user\nMessage: the")
    assert shown.endswith("\nTopic (lost, praise, refund):<|im_end|>\n<|im_start|>assistant\n")
    assert len(shown) < len(long)


def test_auto_without_a_chat_template_is_the_plain_prompt(toy_paths: dict[str, Path]) -> None:
    plain = make(toy_paths["decoder"], chat="never")
    auto = make(toy_paths["decoder"], chat="auto")
    assert auto.chat is None
    assert [it.input_ids for it in auto.encode(TEXTS, [0, 1, 2])] == [it.input_ids for it in plain.encode(TEXTS, [0, 1, 2])]


def test_always_without_a_chat_template_names_method_chat(toy_paths: dict[str, Path]) -> None:
    with pytest.raises(SettingError) as err:
        make(toy_paths["decoder"], chat="always")
    assert err.value.key == "method.chat" and "no chat template" in str(err.value)
    assert "\n" not in str(err.value)


def test_always_on_an_encoder_decoder_is_refused(toy_paths: dict[str, Path]) -> None:
    with pytest.raises(SettingError) as err:
        make(toy_paths["encoder-decoder"], chat="always")
    assert err.value.key == "method.chat"


def test_chat_framing_changes_the_token_cache_key(chat_decoder: Path) -> None:
    assert make(chat_decoder, chat="always").cache_params() != make(chat_decoder, chat="never").cache_params()
