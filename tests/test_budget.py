"""The resource estimate's arithmetic and the fast-setting detection."""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import pytest
import torch
from transformers import T5Config

from alignrun import budget
from alignrun.config import Experiment


def _experiment(model: Path, **sections: dict) -> Experiment:
    return Experiment.model_validate({
        "base": {"model": str(model), "device": "cpu"},
        "reward": {"backend": "callable", "source": "unused_module:unused_function"},
        "data": {"prompts": "unused.jsonl"},
        **sections,
    })


@pytest.fixture(scope="module")
def t5_small_config(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Only config.json of a T5-small-shaped model: the estimate must not need weights."""
    folder = tmp_path_factory.mktemp("t5-small-shape")
    T5Config(vocab_size=32128, d_model=512, d_kv=64, num_heads=8, d_ff=2048, num_layers=6,
             num_decoder_layers=6).save_pretrained(folder)
    assert not list(folder.glob("*.safetensors"))
    return folder


def test_weight_bytes_per_parameter():
    # Common practice (REFERENCES.md, Resources): 1e9 parameters ~ 4 GB in fp32, 2 GB in bf16, 1 GB in int8.
    assert budget.weight_bytes(10**9, "fp32") == 4 * 10**9
    assert budget.weight_bytes(10**9, "bf16") == 2 * 10**9
    assert budget.weight_bytes(10**9, "int8") == 1 * 10**9
    with pytest.raises(ValueError, match="unknown dtype"):
        budget.weight_bytes(10, "fp8")


def test_adamw_state_and_gradient_bytes():
    # Kingma & Ba 2015: two fp32 moments = +8 bytes per trainable parameter; plus a 4-byte fp32 gradient
    # (common practice, REFERENCES.md). 294,912 LoRA parameters -> 3,538,944 bytes.
    assert budget.optimizer_bytes(294_912) == 294_912 * (8 + 4) == 3_538_944


def test_lora_count_t5_small_on_meta_device(t5_small_config: Path):
    # Hu et al. 2021, worked example in REFERENCES.md: 36 matrices of 512x512, r=8 -> 36 * 8 * 1024 = 294,912.
    cfg = _experiment(t5_small_config, lora={"rank": 8, "targets": ["q", "v"], "scope": "encoder-decoder"})
    model = budget.meta_model(cfg)
    assert all(p.device.type == "meta" for p in model.parameters())
    assert budget.lora_param_count(model, ["q", "v"], 8) == 294_912
    # the decoder alone: 6 self- and 6 cross-attention blocks -> 24 * 8 * 1024 = 196,608
    assert budget.lora_param_count(model, ["q", "v"], 8, "decoder") == 196_608
    assert budget.estimate(_experiment(t5_small_config, lora={"rank": 8})).lora_params == 196_608
    est = budget.estimate(cfg)  # "auto" resolves to q, v for T5 as well
    assert est.lora_params == 294_912
    assert est.trainable_params == 294_912 + 512 + 1  # plus the value head's weight and bias
    # 60.5M parameters for the T5-small shape (REFERENCES.md): LoRA is about 0.49% of them
    assert round(est.base_params / 1e6, 1) == 60.5
    assert round(100 * est.lora_params / est.base_params, 2) == 0.49


def test_forward_flop_parameters_by_hand(t5_small_config: Path):
    # Non-embedding parameters N (forward FLOPs = 2 N per token, Kaplan et al. 2020), derived by hand from
    # the T5 block layout (Raffel et al. 2020): an encoder layer has 4 attention projections 512x512, a
    # feed-forward 512x2048 + 2048x512 and 2 layer-norm scales of 512; a decoder layer adds a cross-attention
    # block (4 more 512x512) and a third layer norm; each stack ends in a layer norm; the output projection
    # is 512 x 32128 (computed per decoder token even though it is tied to the input embedding).
    model = budget.meta_model(_experiment(t5_small_config))
    dims = budget.model_dims(model)
    enc_layer = 4 * 512 * 512 + 2 * 512 * 2048 + 2 * 512
    dec_layer = 8 * 512 * 512 + 2 * 512 * 2048 + 3 * 512
    assert dims.enc_params == 6 * enc_layer + 512
    assert dims.dec_params == 6 * dec_layer + 512 + 512 * 32128


def test_estimate_memory_adds_up_and_copy_mode_doubles_weights(t5_small_config: Path):
    shared = budget.estimate(_experiment(t5_small_config))
    copy = budget.estimate(_experiment(t5_small_config, reference={"mode": "copy"}))
    mb = 1024 * 1024
    # fp32 weights at 4 bytes each (common practice); the copy keeps a second frozen base
    assert shared.weights_mb == pytest.approx((4 * shared.base_params + 4 * shared.trainable_params) / mb)
    assert copy.weights_mb - shared.weights_mb == pytest.approx(4 * shared.base_params / mb)
    assert shared.optimizer_mb == pytest.approx(12 * shared.trainable_params / mb)
    assert shared.peak_mb == pytest.approx(shared.weights_mb + shared.optimizer_mb + shared.activations_mb
                                           + shared.overhead_mb)
    assert shared.seconds_per_step > 0 and shared.warning is None


@pytest.mark.parametrize("scope", ["decoder", "encoder-decoder"])
def test_estimate_counts_match_the_loaded_policy(tiny_models: dict[str, Path], scope: str):
    from alignrun.models import build_policy

    cfg = _experiment(tiny_models["t5"], lora={"rank": 4, "targets": "all-linear", "scope": scope},
                      base={"model": str(tiny_models["t5"]), "precision": "bf16"})
    est = budget.estimate(cfg)
    policy = build_policy(cfg.base, cfg.lora, cfg.reference, torch.device("cpu"))
    # peft's own count of what it adapted, and the parameters of the real loaded model
    assert est.lora_params == policy.trainable_params
    assert est.total_params == policy.total_params
    assert est.value_head_params == sum(p.numel() for p in policy.net.value_head.parameters())
    # the bytes the loaded policy really holds (bf16 frozen linear weights), value head included
    held = sum(p.numel() * p.element_size() for p in policy.net.parameters())
    assert est.weights_mb * 1024 * 1024 == held


def test_bf16_weight_bytes_by_hand(t5_small_config: Path):
    # T5-small (Raffel et al. 2020): 6 encoder layers of 4 x 512x512 attention + 512x2048 + 2048x512 feed-forward,
    # 6 decoder layers with 8 x 512x512; the output projection is tied to the 32128 x 512 embedding, which stays
    # fp32 like the norms. 2 bytes per bf16 weight, 4 per fp32 weight (common practice).
    model = budget.meta_model(_experiment(t5_small_config))
    linear = 6 * (4 * 512 * 512 + 2 * 512 * 2048) + 6 * (8 * 512 * 512 + 2 * 512 * 2048)
    assert linear == 44_040_192
    total = sum(p.numel() for p in {id(p): p for p in model.parameters()}.values())
    assert budget.base_weight_bytes(model, "fp32") == 4 * total
    assert budget.base_weight_bytes(model, "bf16") == 2 * linear + 4 * (total - linear)


def _available(mb: int) -> SimpleNamespace:
    return SimpleNamespace(available=mb * 1024 * 1024)


def test_memory_warning_when_available_memory_is_small(t5_small_config: Path,
                                                      monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setattr(budget.psutil, "virtual_memory", lambda: _available(100))
    est = budget.estimate(_experiment(t5_small_config))
    assert est.available_mb == pytest.approx(100)
    assert est.warning is not None and "exceeds the 100 MB available" in est.warning
    assert budget.describe(est)[-1].startswith("!! predicted peak memory")
    monkeypatch.setattr(budget.psutil, "virtual_memory", lambda: _available(10**6))
    assert budget.estimate(_experiment(t5_small_config)).warning is None


def test_fast_settings_are_booleans_and_follow_the_cpu_flags(monkeypatch: pytest.MonkeyPatch, tmp_path: Path):
    settings = budget.fast_settings()
    assert all(isinstance(settings[key], bool) for key in ("bf16", "amx", "int8_dynamic"))
    cpuinfo = tmp_path / "cpuinfo"
    cpuinfo.write_text("processor\t: 0\nflags\t\t: fpu sse2 avx512f avx512_bf16\n\n"
                       "processor\t: 1\nflags\t\t: fpu\n")
    assert {"avx512f", "avx512_bf16", "fpu"} <= budget.cpu_flags(cpuinfo)
    assert budget.cpu_flags(tmp_path / "missing") == set()
    monkeypatch.setattr(budget.torch.backends.cpu, "get_cpu_capability", lambda: "AVX512")
    monkeypatch.setattr(budget, "cpu_flags", lambda: {"avx512f", "avx512_bf16"})
    assert budget.fast_settings()["bf16"] is True
    monkeypatch.setattr(budget, "cpu_flags", lambda: {"avx512f"})
    assert budget.fast_settings()["bf16"] is False
    assert budget.fast_settings()["recommended_precision"] == "fp32"


def test_bf16_is_suggested_only_where_it_pays():
    settings = {"bf16": True, "cpu_capability": "AVX512", "amx": False, "int8_dynamic": True,
                "recommended_precision": "bf16"}
    assert "try base.precision = \"bf16\"" in budget.describe_fast_settings(settings, "fp32", 60_000_000)
    assert "try" not in budget.describe_fast_settings(settings, "fp32", 2_000_000)  # a tiny model gains nothing
    assert "try" not in budget.describe_fast_settings(settings, "bf16", 60_000_000)
    without = {**settings, "bf16": False, "recommended_precision": "fp32"}
    assert "try base.precision = \"fp32\"" in budget.describe_fast_settings(without, "bf16", 2_000_000)


def test_check_prints_the_estimate_and_the_fast_settings(tiny_models: dict[str, Path], tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]):
    from alignrun.preflight import run_check

    config = tmp_path / "exp.toml"
    config.write_text(f'[base]\nmodel = "{tiny_models["t5"]}"\n[data]\nprompts = "prompts.jsonl"\n'
                      '[reward]\nbackend = "callable"\nharmful_index = 1\n'
                      'source = "tests.tiny_classifiers:class_probabilities"\n')
    assert run_check(config, [], None) == 0
    printed = capsys.readouterr().out
    est = budget.estimate(_experiment(tiny_models["t5"]))
    assert f"parameters: {est.total_params:,} total, {est.trainable_params:,} trainable" in printed
    assert "memory: predicted peak" in printed and "s per step" in printed
    assert "fast settings: bf16" in printed
    run_check(config, ["base.model=/nonexistent/base"], None)  # the verdict still prints without a base model
    assert "resources: not estimated: base.model" in capsys.readouterr().out


def test_emulated_bf16_warning_only_for_bf16_on_a_cpu_without_it():
    assert budget.emulated_bf16_warning("fp32", "cpu", native=False) is None
    assert budget.emulated_bf16_warning("bf16", "cpu", native=True) is None
    assert budget.emulated_bf16_warning("bf16", "cuda", native=False) is None  # a GPU's bf16 is another matter
    assert "emulates bf16" in (budget.emulated_bf16_warning("bf16", "cpu", native=False) or "")
    # torch's CPU capability counts too: AVX2 kernels (ATEN_CPU_CAPABILITY=avx2) do not use avx512_bf16
    assert budget.native_bf16({"avx512_bf16"}, "AVX512") and not budget.native_bf16({"avx512_bf16"}, "AVX2")
    assert budget.native_bf16({"amx_bf16"}, "AVX512") and not budget.native_bf16({"avx512f"}, "AVX512")


def test_run_prints_checks_emulated_bf16_warning_at_start(tiny_models: dict[str, Path], tmp_path: Path,
                                                          capsys: pytest.CaptureFixture[str],
                                                          monkeypatch: pytest.MonkeyPatch):
    from alignrun.config import load_config
    from alignrun.errors import UserError
    from alignrun.preflight import run_check
    from alignrun.trainer import run_experiment
    from tests.tiny_run import write_tiny_experiment

    monkeypatch.setattr(budget, "native_bf16", lambda *args: False)  # a CPU without native bf16
    # a reward that cannot tell harm from benign: the run stops at the preflight, after its start-up lines
    exp = write_tiny_experiment(tmp_path, tiny_models["t5"], reward_source="tests.tiny_run:constant_harm")
    run_check(exp.config, ["base.precision=bf16"], None)
    checked = capsys.readouterr().out
    with pytest.raises(UserError):
        run_experiment(load_config(exp.config, ["base.precision=bf16"]), tmp_path / "run", quiet=True)
    started = capsys.readouterr().out
    line = budget.emulated_bf16_warning("bf16", "cpu", native=False)
    assert line and f"!! {line}" in checked and f"warning: {line}" in started
    run_check(exp.config, [], None)  # fp32: no warning
    assert "emulates bf16" not in capsys.readouterr().out
