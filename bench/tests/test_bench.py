"""Helpers of the speed benchmark (harness/bench*.py): FLOP counting, padding, verdicts, the reference scorer.

Only arithmetic and exactness are tested here; nothing is timed (speed is scripts/benchmark.py's job).
"""

from __future__ import annotations

from pathlib import Path

import pytest
import torch

from bench.flops import (
    attention_flops,
    nonembedding_parameters,
    padded_tokens,
    target_verdict,
    training_flops,
)
from bench.report import summarise
from bench.scoring import per_label_scores


def test_training_flops_match_a_hand_computation():
    # Kaplan et al. 2020 (section 2.1): 6 N FLOPs per token for forward + backward; Hoffmann et al. 2022
    # (appendix F): attention logits + weighted values 4 n d per token and layer forward, x3 with backward.
    # By hand, N = 1000, L = 2, d = 8, lengths 10 and 20, 2 epochs:
    #   10 tokens: 6*1000*10 + 12*2*10*10*8 = 60,000 + 19,200 = 79,200
    #   20 tokens: 6*1000*20 + 12*2*20*20*8 = 120,000 + 76,800 = 196,800
    #   (79,200 + 196,800) * 2 = 552,000
    assert training_flops([10, 20], params=1000, layers=2, hidden=8, epochs=2) == 552_000
    assert attention_flops(20, layers=2, hidden=8) == 76_800


def test_flops_of_a_bert_base_sized_model_are_close_to_6n_at_short_context():
    # Kaplan et al. 2020, section 2.1 (from memory): the context-dependent term is a small share of the
    # total while d_model is large against n_ctx / 12. BERT-base (Devlin et al. 2019): 12 layers, width
    # 768, about 85M non-embedding parameters; at 128 tokens the attention adds under 3 % to 6N.
    n = 85_000_000
    per_token = training_flops([128], params=n, layers=12, hidden=768) / 128
    assert 1.0 < per_token / (6 * n) < 1.03
    assert training_flops([4096], params=n, layers=12, hidden=768) / 4096 / (6 * n) > 1.5  # long context: not small


@pytest.mark.parametrize("kind", ["encoder", "decoder"])
def test_nonembedding_parameters_agree_with_the_library_count(toy_paths: dict[str, Path], kind: str):
    from transformers import AutoModel, AutoModelForCausalLM

    # The library's own count (PreTrainedModel.num_parameters(exclude_embeddings=True)) leaves out every
    # nn.Embedding weight; a tied output layer (the decoder's) must not be counted back in.
    cls = AutoModel if kind == "encoder" else AutoModelForCausalLM
    model = cls.from_pretrained(toy_paths[kind])
    assert nonembedding_parameters(model) == model.num_parameters(exclude_embeddings=True)
    assert 0 < nonembedding_parameters(model) < sum(p.numel() for p in model.parameters())


def test_nonembedding_parameters_of_a_small_bert_by_hand():
    from transformers import BertConfig, BertModel

    # Per layer (the BERT architecture): Q, K, V and the attention output 4 * (16*16 + 16) = 1,088; two
    # LayerNorms 2 * 32 = 64; feed-forward 16*32 + 32 + 32*16 + 16 = 1,072; total 2,224. Two layers 4,448,
    # the embedding LayerNorm 32 and the pooler 16*16 + 16 = 272: 4,752. Embedding matrices excluded.
    config = BertConfig(vocab_size=100, hidden_size=16, num_hidden_layers=2, num_attention_heads=2,
                        intermediate_size=32, max_position_embeddings=64, type_vocab_size=2)
    assert nonembedding_parameters(BertModel(config)) == 4_752


def test_padded_tokens_count_every_batch_at_its_longest_row():
    lengths = [3, 5, 2, 7]
    # [0, 1] pads to 5 -> 10 tokens; [2, 3] pads to 7 -> 14 tokens; a one-row batch costs its own length.
    assert padded_tokens(lengths, [[0, 1], [2, 3]]) == 24
    assert padded_tokens(lengths, [[3], [0, 1, 2]]) == 7 + 15
    assert padded_tokens(lengths, [[0], [1], [2], [3]]) == sum(lengths)  # no padding at all


def test_padded_tokens_follow_the_widths_of_the_head_collate():
    from harness.methods.batches import batch_width, collate_encoded
    from harness.methods.registry import Encoded

    # The count must equal the tensor sizes the head method's own collate produces (max_length 40).
    lengths = [3, 5, 2, 37, 12, 1, 39]
    batches = [[0, 1], [2, 3, 4], [5], [6]]
    items = [Encoded(tuple([7] * n), 0) for n in lengths]
    expected = sum(collate_encoded([items[i] for i in b], 0, False, limit=40)["input_ids"].numel() for b in batches)
    counted = padded_tokens(lengths, batches, width=lambda n: batch_width(n, 40))
    assert counted == expected == 2 * 5 + 3 * 40 + 1 * 1 + 1 * 40  # 37 and 39 round up to 40


def test_attention_dropout_switch_reaches_every_self_attention_layer(toy_paths: dict[str, Path]):
    from transformers import AutoModel

    from bench.ablate import set_attention_dropout

    # The library's BERT reads each layer's attention dropout from that layer's own nn.Dropout at run time.
    model = AutoModel.from_pretrained(toy_paths["encoder"])
    assert set_attention_dropout(model, 0.0) == model.config.num_hidden_layers
    probs = [m.dropout.p for m in model.modules() if type(m).__name__.endswith("SelfAttention")]
    assert probs == [0.0] * model.config.num_hidden_layers
    assert model.config.hidden_dropout_prob > 0 and any(
        isinstance(m, torch.nn.Dropout) and m.p == model.config.hidden_dropout_prob for m in model.modules())


def test_target_verdicts_say_by_how_much_a_target_is_missed():
    assert target_verdict(2.31, 2.0, higher_is_better=True, unit="x") == "met (2.31x >= 2.00x)"
    assert target_verdict(1.88, 2.0, higher_is_better=True, unit="x") == "missed by 0.12x (1.88x < 2.00x)"
    assert target_verdict(1.5, 1.2, higher_is_better=False) == "missed by 0.30 (1.50 > 1.20)"
    assert target_verdict(1.1, 1.2, higher_is_better=False) == "met (1.10 <= 1.20)"
    assert target_verdict(None, 1.2, higher_is_better=False) == "not measured"


def _run(kind: str, seed: int, eps: float, acc: float) -> dict:
    job = {"kind": kind, "model": "minilm-l6", "task_name": "sms-spam", "seed": seed,
           "id": f"{kind}-minilm-l6-sms-spam-s{seed}"}
    result = {"examples_per_second": eps, "accuracy": acc, "macro_f1": acc, "peak_rss_mb": 900.0 + seed,
              "train_seconds": 100.0, "lengths": [10, 20], "real_tokens": 45, "padded_tokens": 60, "torch_threads": 2,
              "train_examples": 2, "test_examples": 2,
              "model": {"nonembedding_parameters": 1000, "layers": 2, "hidden": 8}}
    return {"job": job, "result": result}


def test_summary_takes_the_median_of_same_seed_ratios_against_every_contender():
    # Pairs (harness, bf16 Trainer) per seed: ratios 2.0, 3.0 and 2.5 -> median 2.5; the median of each
    # contender's throughputs alone would give 30 / 12 = 2.5 here too, but not in general.
    results = [_run("harness", 1, 20.0, 0.98), _run("trainer_bf16", 1, 10.0, 0.97),
               _run("trainer_bf16", 2, 12.0, 0.96), _run("harness", 2, 36.0, 0.98),
               _run("harness", 3, 30.0, 0.99), _run("trainer_bf16", 3, 12.0, 0.98),
               _run("plain_bf16", 1, 20.0, 0.995), _run("plain_bf16", 2, 24.0, 0.995), _run("plain_bf16", 3, 25.0, 0.995)]
    report = summarise(results, matmul=[1e3], machine={"bf16_matmul_flops_per_second": 2e3},
                       settings={"train.bf16": True}, mode="test", seconds=1.0)
    row = report["training"][0]
    vs = row["versus"]["trainer_bf16"]
    assert vs["throughput_ratios"] == [2.0, 3.0, 2.5] and vs["throughput_ratio"] == 2.5
    assert vs["accuracy_gap_points"] == pytest.approx(100 * ((0.98 + 0.98 + 0.99) - (0.97 + 0.96 + 0.98)) / 3)
    assert row["versus"]["plain_bf16"]["throughput_ratios"] == [1.0, 1.5, 1.2]
    assert "trainer_fp32" not in row["versus"]  # a contender that did not run is left out, not invented
    # 1.5 epochs of 30 real tokens (real_tokens / sum(lengths)): 6*1000*(10+20) + 12*2*8*(100+400) = 276,000
    # per pass, 414,000 in all, over 100 s, against a 1,000 FLOP/s fp32 and a 2,000 FLOP/s bf16 matmul peak.
    assert row["harness"]["training_flops"] == pytest.approx(414_000)
    assert row["harness"]["matmul_fraction"] == pytest.approx(4.14)
    assert row["harness"]["bf16_fraction"] == pytest.approx(2.07)
    assert row["harness"]["padding_efficiency"] == pytest.approx(0.75)
    verdicts = {t["target"]: t["verdict"] for t in report["targets"]}
    assert verdicts["training throughput, harness / Trainer, bf16 + length groups, minilm-l6 sms-spam"].startswith("met")
    assert verdicts["training throughput, harness / plain loop, bf16, minilm-l6 sms-spam"] == \
        "missed by 0.30x (1.20x < 1.50x)"
    # 98.33 % against 99.50 %: 1.17 points lower
    assert verdicts["accuracy, harness - plain loop, bf16 (points), minilm-l6 sms-spam"] == "missed by 0.17 (-1.17 < -1.00)"


def test_training_table_shows_a_spread_of_accuracy_only_over_several_seeds():
    from bench.report import render_markdown

    def table(results: list[dict]) -> list[str]:
        machine = {"cpu_model": "test CPU", "physical_cores": 2, "logical_cores": 2, "memory_gb": 8, "torch": "2",
                   "torch_threads": 2, "load_average": [0, 0, 0], "bf16_matmul_flops_per_second": 2e3}
        report = summarise(results, matmul=[1e3], machine=machine, settings={}, mode="test", seconds=1.0)
        return [line for line in render_markdown(report).splitlines() if "| harness | " in line and "| 1.00x |" in line]

    one = table([_run("harness", 1, 20.0, 0.98), _run("plain_bf16", 1, 20.0, 0.99)])
    assert len(one) == 1 and "| 98.00 |" in one[0] and "±" not in one[0]  # one seed has no spread to show
    three = table([_run("harness", s, 20.0, a) for s, a in ((1, 0.97), (2, 0.98), (3, 0.99))])
    assert "| 98.00 ± 1.00 |" in three[0]  # sample sd of 97, 98, 99 (ddof 1)


def test_whole_run_peaks_are_held_against_their_own_ceilings():
    from bench.memory import MEMORY_RUNS

    names = list(MEMORY_RUNS)
    results = [{"job": {"kind": "memory", "id": f"memory-run-{i}", "memory_run": name},
                "result": {"peak_rss_mb": peak, "method": "head", "batch_size": 8, "bf16": True, "accuracy": 0.9}}
               for i, (name, peak) in enumerate(zip(names, (1400.0, 2600.0, 2400.0, 1200.0), strict=True))]
    report = summarise(results, matmul=[1e3], machine={}, settings={}, mode="test", seconds=1.0)
    verdicts = [t["verdict"] for t in report["targets"] if t["target"].startswith("peak memory (MB)")]
    # the ceilings: 1,500 MB MiniLM defaults, 2,500 MB each SmolLM2 trained arm, 1,500 MB prompt scoring
    assert verdicts == ["met (1400.00 <= 1500.00)", "missed by 100.00 (2600.00 > 2500.00)",
                        "met (2400.00 <= 2500.00)", "met (1200.00 <= 1500.00)"]


def test_memory_runs_are_the_bakeoff_arms_they_name(tmp_path: Path):
    from bench.memory import MEMORY_RUNS, memory_config

    kinds = {name: memory_config(name, tmp_path, {"name": "t", "train": "asset:sms-spam"}) for name in MEMORY_RUNS}
    assert [(c.model.checkpoint, c.method.kind) for c in kinds.values()] == [
        ("asset:minilm-l6", "head"), ("asset:smollm2-135m", "head"), ("asset:smollm2-135m", "next_token"),
        ("asset:smollm2-135m", "prompt")]
    assert all(c.output == str(tmp_path) and not c.sweep.arms for c in kinds.values())
    assert kinds["SmolLM2-135M next_token, bake-off arm"].train.batch_size == 4  # the arm's own setting


def test_plain_loop_groups_strictly_by_length_within_shuffled_pools():
    from bench.plain import POOL_BATCHES, strict_length_batches

    lengths = [(i * 37) % 101 for i in range(4 * POOL_BATCHES * 2 + 5)]
    batches = strict_length_batches(lengths, 4, seed=3, epoch=0)
    assert sorted(i for b in batches for i in b) == list(range(len(lengths)))  # every example once
    assert all(sorted(lengths[i] for i in b) == [lengths[i] for i in b] for b in batches)  # each sorted run
    assert batches != strict_length_batches(lengths, 4, seed=3, epoch=1)  # a new order every epoch
    assert batches == strict_length_batches(lengths, 4, seed=3, epoch=0)  # and the same order again


def test_contender_order_rotates_from_one_seed_to_the_next(tmp_path: Path):
    import importlib.util

    spec = importlib.util.spec_from_file_location("benchmark_script", Path(__file__).parents[2] / "scripts" / "benchmark.py")
    assert spec is not None and spec.loader is not None
    script = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(script)
    jobs = script.training_jobs({**script.QUICK, "seeds": (1, 2, 3)}, None, tmp_path)
    firsts = [j["kind"] for j in jobs if j["model"] == "minilm-l6" and j["task_name"] == "sms-spam"][::5]
    assert firsts == ["harness", "trainer_fp32", "trainer_bf16"]
    assert {j["kind"] for j in jobs} == set(script.CONTENDERS)


def test_a_variant_run_on_every_seed_gets_its_own_memory_speed_and_accuracy_targets():
    base = [_run("harness", 1, 20.0, 0.98), _run("trainer_bf16", 1, 10.0, 0.97),
            _run("trainer_bf16", 2, 12.0, 0.96), _run("harness", 2, 36.0, 0.98)]
    variant = []
    for seed, eps, acc, peak in ((1, 18.0, 0.96, 1400.0), (2, 22.0, 0.965, 1450.0)):
        item = _run("harness", seed, eps, acc)
        item["job"].update(memory_variant="setting X", id=f"memory-3-harness-minilm-l6-sms-spam-s{seed}")
        item["result"]["peak_rss_mb"] = peak
        variant.append(item)
    one_seed = _run("harness", 1, 19.0, 0.9)
    one_seed["job"].update(memory_variant="choice Y", id="memory-1-harness-minilm-l6-sms-spam-s1")
    report = summarise(base + variant + [one_seed], matmul=[1e3], machine={}, settings={}, mode="test", seconds=1.0)
    found = {t["target"]: t for t in report["targets"] if t["target"].endswith("with setting X")}
    assert found["peak memory, MiniLM head training (MB), with setting X"]["value"] == 1450.0
    # median of 18 and 22 = 20 ex/s against the bf16 Trainer's median of 10 and 12 = 11 ex/s
    name = "training throughput, harness / Trainer, bf16 + length groups, minilm-l6 sms-spam, with setting X"
    assert found[name]["value"] == pytest.approx(20 / 11)
    gap = found["accuracy, harness - Trainer, bf16 + length groups (points), minilm-l6 sms-spam, with setting X"]
    assert gap["value"] == pytest.approx(100 * (0.9625 - 0.965)) and gap["verdict"].startswith("met")
    assert not any("choice Y" in t["target"] for t in report["targets"])  # one seed: memory table only
    assert [r["variant"] for r in report["memory"]] == ["setting X", "setting X", "choice Y"]


def test_per_label_reference_scores_equal_unpadded_library_log_probs(toy_paths: dict[str, Path]):
    from transformers import AutoModelForCausalLM

    from harness.methods.rank_scoring import decoder_rank_scores

    # The benchmark's per-label scorer must compute the same numbers as the cached scorer, and both
    # must equal the library's model run on each prompt + label alone (no padding), log-softmaxed.
    model = AutoModelForCausalLM.from_pretrained(toy_paths["decoder"]).eval()
    prompts = [(5, 9, 12, 7), (8, 3), (4, 4, 6, 10, 11, 2)]
    seqs = [(20, 21, 22), (30, 31, 32), (40, 41, 42)]
    pad = 0
    ours = per_label_scores(model, prompts, seqs, pad)
    with torch.no_grad():
        for i, p in enumerate(prompts):
            for j, s in enumerate(seqs):
                logp = model(input_ids=torch.tensor([[*p, *s]])).logits[0].log_softmax(-1)  # (seq, vocab)
                expected = sum(logp[len(p) - 1 + k, tok].item() for k, tok in enumerate(s))
                assert ours[i, j].item() == pytest.approx(expected, abs=1e-4)
    assert torch.allclose(ours, decoder_rank_scores(model, prompts, seqs, pad), atol=1e-4)


def test_benchmark_refuses_a_seed_count_below_one_before_any_work(tmp_path: Path):
    import subprocess
    import sys

    script = Path(__file__).resolve().parents[2] / "scripts" / "benchmark.py"
    proc = subprocess.run([sys.executable, str(script), "--seeds", "0", "--out", str(tmp_path / "out")],
                          capture_output=True, text=True, timeout=120, check=False)
    assert proc.returncode == 2
    assert "--seeds: 0 is not a positive number of seeds" in proc.stderr.strip().splitlines()[-1]
    assert not (tmp_path / "out").exists()  # refused before anything was written


def test_a_job_reports_its_own_peak_not_the_size_of_the_process_that_started_it(tmp_path: Path):
    """Linux carries getrusage's ru_maxrss across fork and exec (getrusage(2)): a small job started
    by a large parent would report the parent's size. The job's own peak (VmHWM) must not."""
    import json
    import subprocess
    import sys

    if not Path("/proc/self/status").exists():
        pytest.skip("VmHWM is Linux's")
    repo = Path(__file__).resolve().parents[2]
    spec, out = tmp_path / "job.json", tmp_path / "result.json"
    spec.write_text(json.dumps({"kind": "noop"}), encoding="utf-8")
    child = ("import sys; import bench.jobs as j; j.JOBS['noop'] = lambda job: {}; "
             f"sys.exit(j.main([{str(spec)!r}, {str(out)!r}]))")
    parent = ("import subprocess, sys; big = bytearray(600 * 2**20); big[::4096] = b'x' * len(big[::4096]); "
              f"sys.exit(subprocess.run([sys.executable, '-c', {child!r}], cwd={str(repo)!r}).returncode)")
    subprocess.run([sys.executable, "-c", parent], cwd=repo, check=True, timeout=300)
    peak = json.loads(out.read_text(encoding="utf-8"))["peak_rss_mb"]
    assert 0 < peak < 500  # the job imports torch (~300 MB here); the parent held 600 MB more
