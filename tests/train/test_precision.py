"""train.bf16: true, false, or auto (on only where the CPU has bf16 instructions and no GPU is used)."""

from __future__ import annotations

from pathlib import Path

import pytest

from harness.config import config_from_dict
from harness.errors import HarnessError
from harness.train import precision
from harness.train.loop import make_accelerator
from harness.train.precision import cpu_has_bf16, uses_bf16
from tests.common import ferry_dict


def _train(tmp_path: Path, value: object) -> object:
    return config_from_dict(ferry_dict(tmp_path, train={"bf16": value})).train


def test_auto_is_the_default_and_follows_the_cpu(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    train = config_from_dict(ferry_dict(tmp_path)).train
    assert train.bf16 == "auto"
    monkeypatch.setattr(precision, "_accelerator_present", lambda: False)
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: True)
    assert uses_bf16(train) is True
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: False)
    assert uses_bf16(train) is False  # the fp32 path, exactly as with bf16: false


def test_auto_leaves_a_gpu_run_in_fp32(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: True)
    monkeypatch.setattr(precision, "_accelerator_present", lambda: True)
    assert uses_bf16(_train(tmp_path, "auto")) is False


def test_an_explicit_choice_is_kept_whatever_the_cpu(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: False)
    assert uses_bf16(_train(tmp_path, True)) is True
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: True)
    assert uses_bf16(_train(tmp_path, False)) is False


def test_the_cpu_probe_agrees_with_the_cpu_flags() -> None:
    # /proc/cpuinfo flags avx512_bf16 and amx_bf16 name the instructions (Linux kernel's x86 cpufeatures list,
    # from memory); torch's own probes must agree with them on this machine.
    cpuinfo = Path("/proc/cpuinfo")
    if not cpuinfo.is_file():
        pytest.skip("no /proc/cpuinfo on this platform")
    flags = set(next((line.split(":", 1)[1].split() for line in cpuinfo.read_text().splitlines()
                      if line.startswith("flags")), []))
    if not flags:
        pytest.skip("/proc/cpuinfo lists no flags here")
    assert cpu_has_bf16() == bool(flags & {"avx512_bf16", "amx_bf16"})


def test_a_word_other_than_auto_is_refused_in_one_line(tmp_path: Path) -> None:
    with pytest.raises(HarnessError) as err:
        _train(tmp_path, "yes")
    assert "train.bf16" in str(err.value) and "\n" not in str(err.value)


def test_the_accelerator_gets_the_resolved_precision(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(precision, "_accelerator_present", lambda: False)
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: False)
    cfg = config_from_dict(ferry_dict(tmp_path))
    assert make_accelerator(cfg).mixed_precision == "no"
    monkeypatch.setattr(precision, "cpu_has_bf16", lambda: True)
    assert make_accelerator(cfg).mixed_precision == "bf16"


def test_a_bf16_trained_run_is_scored_as_the_float32_model_it_exports(tmp_path: Path) -> None:
    # what the run reports must be what `predict` and the library class give for the saved model
    import numpy as np

    from harness.runs.predict import load_exported
    from harness.runs.run import execute_run
    from tests.runs.test_runner import make_cfg, probs_of, read_predictions

    folder = execute_run(make_cfg(tmp_path, "toy:encoder", bf16=True, max_steps=6), log=lambda _: None)
    assert (folder / "environment.json").read_text().count('"bf16": true') == 1
    rows = read_predictions(folder)
    exported = load_exported(folder)
    np.testing.assert_allclose(exported.predict_proba([r["text"] for r in rows]), probs_of(rows), atol=1e-5)
