"""Before a run: parameter counts, predicted peak memory and seconds per step; which fast CPU settings exist.

Parameters are counted on the `meta` device (no weights are loaded). Memory follows the common-practice
byte counts per parameter; time divides a FLOP count by matmul throughput measured here in under a second.
"""

from __future__ import annotations

import statistics
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import psutil
import torch
from torch import nn

from alignrun.config import Experiment
from alignrun.errors import UserError

MB = 1024 * 1024
BYTES_PER_PARAM = {"fp32": 4, "fp16": 2, "bf16": 2, "int8": 1}  # common practice: bytes to hold one weight
ADAMW_STATE_BYTES = 8  # two fp32 moments per trainable parameter (Kingma & Ba 2015)
GRAD_BYTES = 4  # one fp32 gradient per trainable parameter (common practice)
# Resident memory of a process that has imported torch, transformers, peft, trl and accelerate and run a
# step, beyond weights, optimizer state and activations: measured peak RSS (607-630 MB over several runs)
# minus the rest of this estimate (56 MB) for the tiny (2M) shape of scripts/bench on the development
# machine (torch 2.13, Linux); importing the stack alone reaches 501 MB there.
PROCESS_OVERHEAD_MB = 560.0
# Fixed cost of one forward pass through one layer (module calls, small ops, autograd bookkeeping), which
# no FLOP count sees: (measured - FLOP-predicted seconds) / layer passes on the tiny (2M) shape of
# scripts/bench, where it dominates, was 3.6 and 5.1 ms in two runs on the development machine (2 cores
# shared with other work); the small and base shapes check the value.
LAYER_PASS_SECONDS = 0.004
# Fixed costs beyond the layers, from the same tiny shape (means of four bench runs, 2 cores, idle machine):
# per sampled token (sampling over the vocabulary, logits processors, cache bookkeeping), measured generate
# time minus its layer passes, 6 ms; per update minibatch (losses, backward launch, clipping, optimizer step),
# measured update time minus its layer passes, 35 ms.
TOKEN_SECONDS = 0.006
MINIBATCH_SECONDS = 0.035
LOGITS_COPIES_UPDATE = 4  # [mb, T, V] fp32 alive in an update minibatch: logits, log-softmax, 2 gradients
LOGITS_COPIES_ROLLOUT = 2  # [B, T, V] fp32: the per-step logits from generation and their stacked copy


@dataclass
class Estimate:
    base_params: int  # the base model, tied weights counted once
    lora_params: int  # r * (d_in + d_out) per adapted matrix (Hu et al. 2021)
    value_head_params: int
    total_params: int  # base + LoRA, as the trainer reports it
    trainable_params: int  # LoRA + value head: what AdamW holds state for
    weights_mb: float
    optimizer_mb: float  # AdamW moments and gradients of the trainable parameters
    activations_mb: float
    overhead_mb: float
    peak_mb: float
    available_mb: float
    flops_per_step: float
    seconds_per_step: float
    throughput_gflops: dict[str, float]  # measured matmul GFLOP/s: batched, and one token per row (decoding)
    warning: str | None


def weight_bytes(params: int, dtype: str) -> int:
    """Bytes to hold `params` weights: 4 per fp32, 2 per fp16/bf16, 1 per int8 (common practice)."""
    if dtype not in BYTES_PER_PARAM:
        raise ValueError(f"unknown dtype {dtype!r}; expected one of {', '.join(BYTES_PER_PARAM)}")
    return params * BYTES_PER_PARAM[dtype]


def optimizer_bytes(trainable: int) -> int:
    """AdamW: two fp32 moments (Kingma & Ba 2015) plus one fp32 gradient per trainable parameter."""
    return trainable * (ADAMW_STATE_BYTES + GRAD_BYTES)


def meta_model(cfg: Experiment) -> nn.Module:
    """The base architecture built on the meta device from its config: shapes only, no weights read."""
    from transformers import AutoConfig, AutoModelForCausalLM, AutoModelForSeq2SeqLM

    from alignrun.models import is_causal

    base = cfg.base
    try:
        config = AutoConfig.from_pretrained(base.model, revision=base.revision,
                                            trust_remote_code=base.trust_remote_code)
    except (OSError, ValueError) as exc:
        raise UserError(f"base.model: cannot read the model config of {base.model!r} for the resource "
                        f"estimate ({str(exc).splitlines()[0]}); expected a local model folder or a cached "
                        "hub name") from None
    loader: Any = AutoModelForCausalLM if is_causal(base, config) else AutoModelForSeq2SeqLM
    try:
        with torch.device("meta"):
            return loader.from_config(config, trust_remote_code=base.trust_remote_code)
    except ValueError as exc:
        raise UserError(f"base.model: {base.model} is a {config.model_type!r} model, not an encoder-decoder or "
                        f"decoder-only language model ({str(exc).splitlines()[0]})") from None


def lora_param_count(model: Any, targets: str | list[str], rank: int, scope: str = "encoder-decoder") -> int:
    """Sum of r * (d_in + d_out) over the adapted linear layers (Hu et al. 2021).

    targets: leaf module names, or "all-linear" (every linear layer except the output projection);
    scope: "encoder-decoder", or "decoder" for the decoder stack's layers only (a decoder-only model's whole stack).
    """
    from alignrun.models import LINEAR, in_decoder

    output = model.get_output_embeddings() if hasattr(model, "get_output_embeddings") else None
    encoder_decoder = getattr(getattr(model, "config", None), "is_encoder_decoder", True)
    total = 0
    for name, module in model.named_modules():
        if not isinstance(module, LINEAR) or module is output or (
                scope == "decoder" and encoder_decoder and not in_decoder(name)):
            continue
        if targets == "all-linear" or name.rsplit(".", 1)[-1] in targets:
            total += rank * sum(module.weight.shape)  # d_in + d_out, whichever way the weight is stored (Conv1D)
    return total


def base_weight_bytes(model: Any, precision: str) -> int:
    """The base weights as alignrun holds them: all fp32, or under bf16 the linear layers at 2 bytes except an
    output projection tied to the input embeddings (4 and 2 bytes per weight: common practice)."""
    from alignrun.models import LINEAR

    tied = model.get_input_embeddings().weight
    halved = {id(m.weight): m.weight.numel() for m in model.modules()
              if precision == "bf16" and isinstance(m, LINEAR) and m.weight is not tied}
    half = sum(halved.values())
    return weight_bytes(_params(model) - half, "fp32") + weight_bytes(half, "bf16")


def _params(module: nn.Module, skip_embeddings: bool = False) -> int:
    seen = {id(p): p for m in module.modules() if not (skip_embeddings and isinstance(m, nn.Embedding))
            for p in m.parameters(recurse=False)}
    return sum(p.numel() for p in seen.values())


@dataclass
class Dims:
    d_model: int
    d_ff: int
    heads: int
    enc_layers: int
    dec_layers: int
    vocab: int
    enc_params: int  # encoder non-embedding parameters: forward FLOPs per encoder token / 2
    dec_params: int  # decoder non-embedding parameters + output projection: FLOPs per decoder token / 2
    causal: bool = False  # decoder-only: the prompt runs through the decoder stack (no encoder: enc_* are 0)


def model_dims(model: Any) -> Dims:  # a transformers seq2seq or causal model (its typing is loose)
    c = model.config
    head = model.get_output_embeddings()
    if not getattr(c, "is_encoder_decoder", False):
        return Dims(d_model=c.hidden_size, d_ff=getattr(c, "intermediate_size", None) or getattr(c, "n_inner", None)
                    or 4 * c.hidden_size, heads=int(c.num_attention_heads), enc_layers=0,
                    dec_layers=int(c.num_hidden_layers), vocab=c.vocab_size, enc_params=0,
                    dec_params=_params(model.get_decoder(), skip_embeddings=True) + head.weight.numel(), causal=True)
    return Dims(
        d_model=c.d_model, d_ff=getattr(c, "d_ff", None) or getattr(c, "encoder_ffn_dim", 4 * c.d_model),
        heads=int(getattr(c, "num_heads", None) or getattr(c, "encoder_attention_heads", None) or 1),
        enc_layers=int(getattr(c, "num_layers", None) or getattr(c, "encoder_layers", None) or 1),
        dec_layers=int(getattr(c, "num_decoder_layers", None) or getattr(c, "decoder_layers", None) or 1),
        vocab=c.vocab_size, enc_params=_params(model.get_encoder(), skip_embeddings=True),
        dec_params=_params(model.get_decoder(), skip_embeddings=True) + head.weight.numel(),
    )


def _median_seconds(run: Callable[[], object], seconds: float) -> float:
    run()
    times: list[float] = []
    end = time.perf_counter() + seconds
    while time.perf_counter() < end or len(times) < 3:
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return statistics.median(times)  # the median, so a machine busy with other work is seen as it is


def matmul_gflops(m: int, k: int, n: int, precision: str = "fp32", seconds: float = 0.25) -> float:
    """Measured throughput of [m, k] @ [k, n] with fp32 inputs, under bf16 autocast when asked for."""
    from alignrun.models import autocast

    a, b = torch.randn(m, k), torch.randn(k, n)

    def run() -> None:
        with torch.no_grad(), autocast(precision, torch.device("cpu")):
            a @ b

    return 2 * m * k * n / _median_seconds(run, seconds) / 1e9  # a matmul is 2 m k n FLOPs


@dataclass
class Work:
    batched_flops: float  # whole-batch matmuls: prompt encoding, reference forward, updates
    decode_flops: float  # one token per row per call: the decoder while sampling
    layer_passes: int  # forward passes through one layer (a backward counts as two)
    sampled_tokens: int  # decoding steps of the batch
    minibatches: int  # update iterations: epochs x minibatches


def replies(cfg: Experiment) -> int:
    """Replies per step: each prompt is sampled method.samples_per_prompt times (the trainer repeats it)."""
    return cfg.ppo.prompts_per_step * cfg.method.samples_per_prompt


def step_work(d: Dims, cfg: Experiment, trainable: int) -> Work:
    """The work of one step; attention score FLOPs are left out (short sequences).

    Forward: 2 x non-embedding parameters x tokens (Kaplan et al. 2020). Backward through frozen weights
    needs only input gradients (another 2 x) plus weight gradients of the trainable ones (2 x trainable x
    tokens); with every weight trainable this gives the usual 3 x forward. With lora.scope = "decoder" the
    encoder runs once per step and the reference and the updates run the decoder only. A decoder-only model
    runs prompt and reply through its one stack in every pass (the output projection on reply positions only).
    """
    b, p, t = replies(cfg), cfg.generation.max_prompt_tokens, cfg.generation.max_new_tokens
    epochs, minibatches = cfg.ppo.epochs, cfg.ppo.prompts_per_step // cfg.ppo.minibatch
    trained_encoder = cfg.lora.scope != "decoder"
    if d.causal:
        body = d.dec_params - d.vocab * d.d_model  # the stack without the output projection
        prefill = 2 * body * b * p  # sampling reads the prompt once (the output projection on its last token only)
        forward = prefill + 2 * d.dec_params * b * t
        backward = forward + 2 * trainable * b * (p + t)
        layers = d.dec_layers + 1
        passes = layers + t * layers + layers + epochs * minibatches * 3 * layers
        return Work(batched_flops=prefill + forward + epochs * (forward + backward),
                    decode_flops=2 * d.dec_params * b * t, layer_passes=passes, sampled_tokens=t,
                    minibatches=epochs * minibatches)
    encode = 2 * d.enc_params * b * p  # sampling encodes the prompts once
    decode = 2 * d.dec_params * b * t  # then runs the decoder and output projection once per new token
    forward = encode * trained_encoder + 2 * d.dec_params * b * t
    backward = forward + 2 * trainable * b * (p * trained_encoder + t)
    layers = d.enc_layers * trained_encoder + d.dec_layers + 1  # + the output projection and loss
    passes = (d.enc_layers + t * (d.dec_layers + 1)) + layers + epochs * minibatches * 3 * layers
    return Work(batched_flops=encode + forward + epochs * (forward + backward), decode_flops=decode,
                layer_passes=passes, sampled_tokens=t, minibatches=epochs * minibatches)


def activation_bytes(d: Dims, cfg: Experiment) -> int:
    """The larger of the rollout's and one update minibatch's live tensors (fp32), estimated from shapes.

    Per token and layer, backward keeps about 8 d_model-wide and 2 d_ff-wide tensors plus 2 attention maps
    (scores and probabilities); the vocabulary-wide logits dominate short replies.
    """
    b, mb = replies(cfg), cfg.ppo.minibatch * cfg.method.samples_per_prompt
    p, t = cfg.generation.max_prompt_tokens, cfg.generation.max_new_tokens
    enc = mb * p * d.enc_layers * (8 * d.d_model + 2 * d.d_ff + 2 * d.heads * p) * (cfg.lora.scope != "decoder")
    seq = t + p * d.causal  # a decoder-only model keeps the prompt's activations too
    dec = mb * seq * d.dec_layers * (12 * d.d_model + 2 * d.d_ff + 2 * d.heads * (t + p))
    update = 4 * (enc + dec + LOGITS_COPIES_UPDATE * mb * t * d.vocab)
    rollout = 4 * LOGITS_COPIES_ROLLOUT * b * t * d.vocab
    return max(update, rollout)


def estimate(cfg: Experiment) -> Estimate:
    """Parameter counts, peak memory (MB) and seconds per step predicted for `cfg` on this machine."""
    from alignrun.models import lora_targets

    model = meta_model(cfg)
    d = model_dims(model)
    base = _params(model)
    lora = lora_param_count(model, lora_targets(model, cfg.lora.targets), cfg.lora.rank, cfg.lora.scope)
    head = d.d_model + 1
    trainable = lora + head
    copies = 2 if cfg.reference.mode == "copy" else 1
    weights = base_weight_bytes(model, cfg.base.precision) * copies + weight_bytes(lora + head, "fp32")
    optimizer = optimizer_bytes(trainable)
    activations = activation_bytes(d, cfg)
    peak_mb = (weights + optimizer + activations) / MB + PROCESS_OVERHEAD_MB
    work = step_work(d, cfg, trainable)
    b, mb, p = replies(cfg), cfg.ppo.minibatch * cfg.method.samples_per_prompt, cfg.generation.max_prompt_tokens
    precision = cfg.base.precision
    # calibration (< 1 s): an encoder feed-forward matmul at update batch size, and the output projection at
    # one token per row, memory-bound like every matmul while decoding
    throughput = {"batched": matmul_gflops(mb * p, d.d_model, d.d_ff, precision),
                  "decode": matmul_gflops(b, d.d_model, d.vocab, precision)}
    seconds = (work.batched_flops / (throughput["batched"] * 1e9)
               + work.decode_flops / (throughput["decode"] * 1e9) + work.layer_passes * LAYER_PASS_SECONDS
               + work.sampled_tokens * TOKEN_SECONDS + work.minibatches * MINIBATCH_SECONDS)
    available = psutil.virtual_memory().available / MB
    warning = None
    if peak_mb > available:
        warning = (f"predicted peak memory {peak_mb:,.0f} MB exceeds the {available:,.0f} MB available: "
                   "lower ppo.minibatch or generation.max_new_tokens, use a smaller base.model, or keep "
                   "reference.mode = 'adapters-off'")
    return Estimate(base_params=base, lora_params=lora, value_head_params=head, total_params=base + lora,
                    trainable_params=trainable, weights_mb=weights / MB, optimizer_mb=optimizer / MB,
                    activations_mb=activations / MB, overhead_mb=PROCESS_OVERHEAD_MB, peak_mb=peak_mb,
                    available_mb=available, flops_per_step=work.batched_flops + work.decode_flops,
                    seconds_per_step=seconds, throughput_gflops=throughput, warning=warning)


def cpu_flags(path: Path = Path("/proc/cpuinfo")) -> set[str]:
    """The CPU feature flags the kernel reports (empty where /proc/cpuinfo does not exist)."""
    try:
        text = path.read_text()
    except OSError:
        return set()
    return {f for line in text.splitlines() if line.startswith(("flags", "Features"))
            for f in line.partition(":")[2].split()}


def _int8_dynamic_works() -> bool:
    try:
        from torch.ao.quantization import quantize_dynamic

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the torch.ao API announces its deprecation on every call
            layer = quantize_dynamic(nn.Sequential(nn.Linear(8, 8)), {nn.Linear}, dtype=torch.qint8)
            layer(torch.zeros(1, 8))
        return True
    except (ImportError, RuntimeError, AttributeError):
        return False


def fast_settings() -> dict[str, bool | str]:
    """Which fast CPU settings this machine and torch build support.

    bf16: native bf16 dot products (avx512_bf16 or amx_bf16) and torch's AVX-512 kernels, so
    base.precision = "bf16" (autocast) is faster; int8_dynamic: torch's dynamic int8 quantisation of
    linear layers runs here (alignrun does not train on int8 weights; this is for information).
    """
    flags = cpu_flags()
    capability = torch.backends.cpu.get_cpu_capability()
    bf16 = native_bf16(flags, capability)
    return {"cpu_capability": capability, "bf16": bf16, "amx": "amx_bf16" in flags,
            "int8_dynamic": _int8_dynamic_works(), "recommended_precision": "bf16" if bf16 else "fp32"}


def native_bf16(flags: set[str] | None = None, capability: str | None = None) -> bool:
    """bf16 dot products in hardware (avx512_bf16 or amx_bf16) and torch using its AVX-512 kernels; otherwise
    torch emulates bf16 and autocast is slower than fp32 (ATEN_CPU_CAPABILITY=avx2 simulates such a CPU)."""
    flags = cpu_flags() if flags is None else flags
    capability = torch.backends.cpu.get_cpu_capability() if capability is None else capability
    return bool(flags & {"avx512_bf16", "amx_bf16"}) and "AVX512" in capability


def emulated_bf16_warning(precision: str, device: str = "cpu", native: bool | None = None) -> str | None:
    """The warning `alignrun check` and `alignrun run` both print for bf16 on a CPU without native bf16."""
    on_gpu = device == "cuda" or device == "auto" and torch.cuda.is_available()
    if precision != "bf16" or on_gpu or (native_bf16() if native is None else native):
        return None
    return (f"base.precision = \"bf16\" on a CPU without native bf16 (no avx512_bf16/amx_bf16, or torch not using "
            f"AVX-512: cpu {torch.backends.cpu.get_cpu_capability()}): torch emulates bf16, so steps are several times "
            "slower than in fp32; use base.precision = \"fp32\" here")


def describe(est: Estimate) -> list[str]:
    """The estimate as lines for `alignrun check`."""
    lines = [
        f"parameters: {est.total_params:,} total, {est.trainable_params:,} trainable "
        f"(LoRA {est.lora_params:,} + value head {est.value_head_params:,})",
        f"memory: predicted peak {est.peak_mb:,.0f} MB (weights {est.weights_mb:,.0f}, AdamW + gradients "
        f"{est.optimizer_mb:,.1f}, activations {est.activations_mb:,.0f}, process {est.overhead_mb:,.0f}); "
        f"available {est.available_mb:,.0f} MB",
        f"time: about {est.seconds_per_step:,.1f} s per step ({est.flops_per_step / 1e9:,.0f} GFLOP; matmuls "
        f"measured here at {est.throughput_gflops['batched']:.1f} GFLOP/s batched, "
        f"{est.throughput_gflops['decode']:.1f} while decoding)",
    ]
    if est.warning:
        lines.append(f"!! {est.warning}")
    return lines


# bf16 halved the step of the 61M and 223M shapes of scripts/bench and gained nothing on the 2M one.
BF16_WORTH_PARAMS = 50_000_000


def describe_fast_settings(settings: dict[str, bool | str], precision: str, params: int | None = None) -> str:
    """One line for `alignrun check`: what the CPU supports and whether the config uses it; bf16 is suggested
    only for models big enough to gain from it (`params`, when known)."""
    hint = ""
    worth = params is None or params >= BF16_WORTH_PARAMS or settings["recommended_precision"] == "fp32"
    if settings["recommended_precision"] != precision and worth:
        why = "faster steps; a run drifts as with another seed" if settings["bf16"] else "no native bf16 here"
        hint = f"; try base.precision = \"{settings['recommended_precision']}\" ({why})"
    return (f"fast settings: bf16 {'yes' if settings['bf16'] else 'no'} (cpu {settings['cpu_capability']}"
            f"{', amx' if settings['amx'] else ''}), int8 dynamic quantisation "
            f"{'yes' if settings['int8_dynamic'] else 'no'}; base.precision = \"{precision}\"{hint}")
