"""Tiny randomly initialised checkpoints (encoder, decoder, encoder-decoder) built offline in seconds.

They stand in for real pretrained models in tests and demos: same folder layout (config.json,
model.safetensors, tokenizer.json), loadable through the transformers auto classes, but a few
hundred kilobytes each and built from nothing but a seed and some text.
"""

from __future__ import annotations

import csv
import hashlib
import itertools
from collections.abc import Sequence
from pathlib import Path

import torch
from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, processors, trainers
from transformers import (
    BertConfig,
    BertModel,
    GPT2Config,
    GPT2LMHeadModel,
    PreTrainedModel,
    PreTrainedTokenizerFast,
    T5Config,
    T5ForConditionalGeneration,
)

from harness.errors import HarnessError
from harness.files import atomic_folder
from harness.files import cache_dir as default_cache
from harness.models.quiet import quiet_library

TOY_KINDS = ("encoder", "decoder", "encoder-decoder")

# Bump when anything below changes what gets built, so cached folders from older recipes are not reused.
_RECIPE = "toy-1"
_VOCAB_SIZE = 1000  # target for tokenizer training; small corpora stop earlier
_MAX_POSITIONS = 256
_HIDDEN = 64
_LAYERS = 2
_HEADS = 4
_TEXT_COLUMNS = ("text", "question", "reply")
_MARK = "\u2581"  # "▁", the word-start marker of Metaspace pre-tokenization
_BERT_SPECIALS = ("[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]")
_GPT_EOS, _GPT_PAD = "<|endoftext|>", "<pad>"
_T5_SPECIALS = ("<pad>", "</s>", "<unk>")  # ids 0, 1, 2 as in T5
_REPO_ROOT = Path(__file__).resolve().parents[2]  # harness/models/toy.py -> the checkout


def build_toy(kind: str, out_dir: Path, *, texts: Sequence[str], seed: int = 0) -> Path:
    """Build a tiny `kind` checkpoint with a tokenizer trained on `texts` into `out_dir`; return `out_dir`.

    Same kind, seed and texts give byte-identical weight and tokenizer files.
    """
    _check_kind(kind)
    texts = [t for t in texts if t.strip()]
    if not texts:
        raise HarnessError(
            f"build_toy({kind!r}): no non-empty text to train the tokenizer on; pass some texts"
        )
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    tokenizer = _TOKENIZERS[kind](texts)
    # fork_rng so building a toy never moves the caller's global random stream.
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        model = _MODELS[kind](tokenizer)
    with quiet_library():
        model.save_pretrained(out_dir)  # transformers 5 always writes safetensors (no pickle option left)
    tokenizer.save_pretrained(out_dir)
    return out_dir


def ensure_toy(kind: str, *, seed: int = 0, cache_dir: Path | None = None) -> Path:
    """Return a cached toy folder for `kind`, building it on first use from the sample tasks' texts.

    The folder is `<cache>/toy/<kind>-s<seed>-<hash>`; cache is `cache_dir`, else $HARNESS_CACHE,
    else ~/.cache/harness.
    """
    _check_kind(kind)
    texts = sample_texts()
    root = Path(cache_dir) if cache_dir is not None else default_cache()
    toy_root = root / "toy"
    final = toy_root / f"{kind}-s{seed}-{_texts_hash(texts)}"
    if final.is_dir():
        return final  # only ever created by the rename below, so it is complete
    # Built beside the target and renamed, so an interrupted or concurrent build never leaves a
    # half-written folder under the final name; a folder another process finished first is kept
    # (it holds the same bytes).
    with atomic_folder(final, is_complete=Path.is_dir) as tmp:
        build_toy(kind, tmp, texts=texts, seed=seed)
    return final


def toy_main(out_dir: Path, seed: int) -> list[Path]:
    """Build every toy kind into `out_dir/<kind>` from the sample tasks' texts; return the folders."""
    texts = sample_texts()
    return [build_toy(kind, Path(out_dir) / kind, texts=texts, seed=seed) for kind in TOY_KINDS]


def sample_texts(root: Path | None = None) -> list[str]:
    """Texts of the `text`/`question`/`reply` columns of `root/sample_tasks/*/*.csv` (root: the repository).

    Falls back to a built-in list of generated sentences when no such file has any text.
    """
    root = _REPO_ROOT if root is None else Path(root)
    texts: list[str] = []
    for path in sorted(root.glob("sample_tasks/*/*.csv")):
        try:
            with path.open(encoding="utf-8-sig", newline="") as handle:
                for row in csv.DictReader(handle):
                    texts.extend(v.strip() for c in _TEXT_COLUMNS if (v := row.get(c)) and v.strip())
        except (UnicodeDecodeError, csv.Error) as exc:
            raise HarnessError(
                f"{path}: cannot be read as a UTF-8 CSV file ({exc}); fix or remove it"
            ) from None
    return texts or _fallback_texts()


def _check_kind(kind: str) -> None:
    if kind not in TOY_KINDS:
        raise HarnessError(f"unknown toy kind {kind!r}; choose one of: {', '.join(TOY_KINDS)}")


def _texts_hash(texts: Sequence[str]) -> str:
    digest = hashlib.sha256(_RECIPE.encode())
    for text in texts:
        digest.update(b"\0" + text.encode("utf-8"))
    return digest.hexdigest()[:12]


def _fallback_texts() -> list[str]:
    """200 invented sentences about a small town's shops, enough to train a toy vocabulary."""
    who = ["The baker", "Our courier", "A neighbour", "The bike mechanic", "My aunt"]
    did = ["fixed", "delivered", "forgot", "praised", "returned"]
    what = [
        "the blue kettle",
        "two loaves of rye bread",
        "a broken bicycle chain",
        "the library books",
        "a parcel of green tea",
        "the squeaky garden gate",
        "seven jars of plum jam",
        "an umbrella with a bent rib",
    ]
    when = ["this morning.", "before lunch!", "late on Friday?", "after the storm.", "twice last week."]
    combos = itertools.product(who, did, what)
    return [f"{w} {d} {o} {when[i % len(when)]}" for i, (w, d, o) in enumerate(combos)]


def _train_bpe(
    tokenizer: Tokenizer, texts: Sequence[str], specials: Sequence[str], alphabet: Sequence[str] = ()
) -> None:
    trainer = trainers.BpeTrainer(
        vocab_size=_VOCAB_SIZE,
        special_tokens=list(specials),
        initial_alphabet=list(alphabet),
        show_progress=False,
    )
    tokenizer.train_from_iterator(list(texts), trainer=trainer)


def _encoder_tokenizer(texts: Sequence[str]) -> PreTrainedTokenizerFast:
    """Lower-casing WordPiece with BERT's special tokens and [CLS] A [SEP] (B [SEP]) templates."""
    normalizer = normalizers.BertNormalizer(lowercase=True)
    # tokenizers' WordPiece trainer numbers its "##" pieces in hash-map order, so two runs on the same
    # texts can give different vocabularies. A BPE over "▁"-marked words is deterministic and maps onto
    # WordPiece directly: "▁piece" starts a word, any other piece continues one ("##piece").
    marked = Tokenizer(models.BPE(unk_token="[UNK]"))
    marked.normalizer = normalizer
    marked.pre_tokenizer = pre_tokenizers.Sequence(
        [
            pre_tokenizers.BertPreTokenizer(),
            pre_tokenizers.Metaspace(replacement=_MARK, prepend_scheme="always"),
        ]
    )
    _train_bpe(marked, texts, _BERT_SPECIALS)
    learned = [
        t for t, _ in sorted(marked.get_vocab().items(), key=lambda kv: kv[1]) if t not in _BERT_SPECIALS
    ]
    # Every seen character both word-initially and inside a word, so no seen word becomes [UNK].
    chars = sorted({c for t in learned for c in t if c != _MARK})
    pieces = [*chars, *(f"##{c}" for c in chars)]
    pieces += [t[1:] if t.startswith(_MARK) else f"##{t}" for t in learned if t != _MARK]
    vocab = {t: i for i, t in enumerate(_BERT_SPECIALS)}
    for piece in pieces:
        vocab.setdefault(piece, len(vocab))

    tokenizer = Tokenizer(models.WordPiece(vocab, unk_token="[UNK]"))
    tokenizer.normalizer = normalizer
    tokenizer.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tokenizer.decoder = decoders.WordPiece(prefix="##")
    cls_id, sep_id = vocab["[CLS]"], vocab["[SEP]"]
    tokenizer.post_processor = processors.TemplateProcessing(
        single="[CLS] $A [SEP]",
        pair="[CLS] $A [SEP] $B:1 [SEP]:1",  # second segment gets token_type_id 1
        special_tokens=[("[CLS]", cls_id), ("[SEP]", sep_id)],
    )
    return PreTrainedTokenizerFast(
        tokenizer_object=tokenizer,
        pad_token="[PAD]",
        unk_token="[UNK]",
        cls_token="[CLS]",
        sep_token="[SEP]",
        mask_token="[MASK]",
        model_max_length=_MAX_POSITIONS,
        model_input_names=["input_ids", "token_type_ids", "attention_mask"],
    )


def _decoder_tokenizer(texts: Sequence[str]) -> PreTrainedTokenizerFast:
    """GPT-2-style byte-level BPE; adds no special tokens, pads with a <pad> distinct from <|endoftext|>."""
    tokenizer = Tokenizer(models.BPE())
    tokenizer.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tokenizer.decoder = decoders.ByteLevel()
    _train_bpe(tokenizer, texts, (_GPT_EOS, _GPT_PAD), alphabet=pre_tokenizers.ByteLevel.alphabet())
    return PreTrainedTokenizerFast(
        tokenizer_object=tokenizer,
        bos_token=_GPT_EOS,
        eos_token=_GPT_EOS,
        unk_token=_GPT_EOS,
        pad_token=_GPT_PAD,
        add_prefix_space=False,
        # Explicit, so transformers sets a "$A" template: nothing added around the text.
        add_bos_token=False,
        add_eos_token=False,
        model_max_length=_MAX_POSITIONS,
        # GPT-2 would add token_type_ids through its word embeddings, so never produce them.
        model_input_names=["input_ids", "attention_mask"],
    )


def _encoder_decoder_tokenizer(texts: Sequence[str]) -> PreTrainedTokenizerFast:
    """T5-style: <pad>=0, </s>=1, <unk>=2, "▁"-marked BPE, </s> appended to every sequence."""
    tokenizer = Tokenizer(models.BPE(unk_token="<unk>"))
    tokenizer.normalizer = normalizers.NFKC()
    tokenizer.pre_tokenizer = pre_tokenizers.Metaspace(replacement=_MARK, prepend_scheme="always")
    tokenizer.decoder = decoders.Metaspace(replacement=_MARK, prepend_scheme="always")
    _train_bpe(tokenizer, texts, _T5_SPECIALS)
    tokenizer.post_processor = processors.TemplateProcessing(
        single="$A </s>", pair="$A </s> $B </s>", special_tokens=[("</s>", 1)]
    )
    return PreTrainedTokenizerFast(
        tokenizer_object=tokenizer,
        pad_token="<pad>",
        eos_token="</s>",
        unk_token="<unk>",
        model_max_length=_MAX_POSITIONS,
        model_input_names=["input_ids", "attention_mask"],
    )


def _encoder_model(tokenizer: PreTrainedTokenizerFast) -> PreTrainedModel:
    config = BertConfig(vocab_size=len(tokenizer), hidden_size=_HIDDEN, num_hidden_layers=_LAYERS,
                        num_attention_heads=_HEADS, intermediate_size=2 * _HIDDEN,
                        max_position_embeddings=_MAX_POSITIONS, type_vocab_size=2, pad_token_id=tokenizer.pad_token_id)
    return BertModel(config, add_pooling_layer=True)  # the pooler feeds BERT's classification head


def _decoder_model(tokenizer: PreTrainedTokenizerFast) -> PreTrainedModel:
    config = GPT2Config(vocab_size=len(tokenizer), n_positions=_MAX_POSITIONS, n_embd=_HIDDEN, n_layer=_LAYERS,
                        n_head=_HEADS, n_inner=2 * _HIDDEN, bos_token_id=tokenizer.bos_token_id,
                        eos_token_id=tokenizer.eos_token_id,
                        pad_token_id=tokenizer.pad_token_id)  # sequence classification finds the last real token with it
    return GPT2LMHeadModel(config)


def _encoder_decoder_model(tokenizer: PreTrainedTokenizerFast) -> PreTrainedModel:
    config = T5Config(
        vocab_size=len(tokenizer),
        d_model=_HIDDEN,
        d_kv=_HIDDEN // _HEADS,
        d_ff=2 * _HIDDEN,
        num_layers=_LAYERS,
        num_heads=_HEADS,
        pad_token_id=tokenizer.pad_token_id,
        eos_token_id=tokenizer.eos_token_id,
    )
    # T5 starts decoding from <pad>. transformers 5's T5Config has no such field (generation settings
    # moved out), but T5's label shifting still reads it from the config, which saves it as an extra key.
    config.decoder_start_token_id = tokenizer.pad_token_id
    return T5ForConditionalGeneration(config)


_TOKENIZERS = {
    "encoder": _encoder_tokenizer,
    "decoder": _decoder_tokenizer,
    "encoder-decoder": _encoder_decoder_tokenizer,
}
_MODELS = {"encoder": _encoder_model, "decoder": _decoder_model, "encoder-decoder": _encoder_decoder_model}


