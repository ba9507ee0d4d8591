"""The int8 copy of a model: which layers become quantised, what stays untouched, the refusals.

Outside references: torch's own `quantize_dynamic` and its quantised Linear class (what the copy must
consist of), transformers' `Conv1D.forward` (what the converted layer must compute), peft's
`merge_and_unload` (what merging the adapters must give), and `torch.save` into a BytesIO (the size).
"""

from __future__ import annotations

import copy
import io

import pytest
import torch
from peft import LoraConfig, get_peft_model
from torch import nn
from transformers.pytorch_utils import Conv1D

from harness.errors import HarnessError
from harness.models import int8
from harness.models.int8 import QuantizedLinear, int8_copy, linear_weights, state_bytes


def _small(seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Embedding(50, 64), nn.Linear(64, 256), nn.ReLU(), nn.Linear(256, 4))


def test_every_linear_layer_of_the_copy_is_quantised_and_the_original_is_untouched() -> None:
    model = _small()
    ids = torch.randint(0, 50, (8, 5))
    before = model(ids).detach().clone()
    copies, facts = int8_copy({"model": model})
    layers = list(copies["model"].modules())
    assert sum(isinstance(m, QuantizedLinear) for m in layers) == 2 == facts["quantized_layers"]
    assert not any(type(m) is nn.Linear for m in layers)
    assert isinstance(copies["model"][0], nn.Embedding)  # embeddings stay float
    assert all(type(m) is nn.Linear for m in (model[1], model[3]))  # the original keeps its float layers
    assert torch.equal(model(ids), before)
    # int8 outputs stay close to the float ones (tolerance: common practice for int8, a few percent of the range)
    with torch.no_grad():
        gap = (copies["model"](ids) - before).abs().max().item()
    assert gap < 0.05 * before.abs().max().item() + 1e-3
    linear = 64 * 256 + 256 + 256 * 4 + 4
    assert facts["quantized_weight_share"] == pytest.approx(linear / (50 * 64 + linear))
    assert 0 < facts["state_bytes"] < facts["float_state_bytes"]  # a layer this wide shrinks (tiny ones need not)


def test_a_module_inside_another_stays_inside_it_and_is_quantised_once() -> None:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Embedding(50, 16), nn.Sequential(nn.Linear(16, 32), nn.ReLU()), nn.Linear(32, 4))
    copies, facts = int8_copy({"model": model, "lm": model[1], "same": model})  # as next_token's model and lm
    assert copies["same"] is copies["model"] and copies["lm"] is copies["model"][1]
    assert isinstance(copies["lm"][0], QuantizedLinear)
    assert facts["quantized_layers"] == 2
    assert facts["float_state_bytes"] == state_bytes(model)  # measured once, not once per name


def test_conv1d_layers_are_converted_to_the_linear_layer_they_compute() -> None:
    torch.manual_seed(1)
    conv = Conv1D(6, 10)  # nf=6 outputs, nx=10 inputs; weight (10, 6)
    nn.init.normal_(conv.bias)
    x = torch.randn(3, 7, 10)
    linear = int8._as_linear(conv)
    torch.testing.assert_close(linear(x), conv(x))  # reference: transformers' Conv1D.forward
    copies, facts = int8_copy({"model": nn.Sequential(conv)})
    assert facts["converted_conv1d"] == 1 and isinstance(copies["model"][0], QuantizedLinear)


def test_lora_adapters_are_merged_as_peft_merges_them() -> None:
    class Net(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.q, self.out = nn.Linear(16, 16), nn.Linear(16, 3)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            return self.out(self.q(x).relu())

    torch.manual_seed(2)
    peft_model = get_peft_model(Net(), LoraConfig(r=2, target_modules=["q"], init_lora_weights=False))
    x = torch.randn(4, 16)
    copies, facts = int8_copy({"model": peft_model})
    merged, _ = int8_copy({"model": copy.deepcopy(peft_model).merge_and_unload()})  # reference: peft's own merge
    assert facts["merged_adapters"] == 1
    with torch.no_grad():
        torch.testing.assert_close(copies["model"](x), merged["model"](x))
    assert facts["quantized_layers"] == 2  # the adapters' own small layers are gone, not quantised


def test_state_bytes_is_what_torch_save_writes() -> None:
    model = _small()
    buffer = io.BytesIO()
    torch.save(model.state_dict(), buffer)  # reference: torch.save itself
    assert state_bytes(model) == len(buffer.getvalue())


def test_a_model_without_linear_layers_is_refused() -> None:
    assert linear_weights({"m": nn.Embedding(10, 4)}) == (0, 40)
    with pytest.raises(HarnessError, match="no nn.Linear or Conv1D layer"):
        int8_copy({"m": nn.Sequential(nn.Embedding(10, 4))})


def test_a_torch_build_without_a_quantised_engine_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(int8, "quantized_engines", lambda: [])
    with pytest.raises(HarnessError, match="no quantised CPU engine"):
        int8_copy({"model": _small()})
