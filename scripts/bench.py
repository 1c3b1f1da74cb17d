"""Benchmark one alignrun step against a bare floor and a naive loop on three random T5-shaped models.

    scripts/bench [--shapes tiny,small,base] [--out bench-results/bench.json] [--no-memory]

For each shape a random model is saved as a Hugging Face folder (WordLevel tokenizer over invented words)
and loaded by the real `build_policy`. In one process, after one warm-up step per variant, it times:

    ours       alignrun.trainer.train_step (fp32): generation with old log-probs and values taken from the
               generation pass, reference with adapters disabled, reward, PPO update
    ours-bf16  the same with base.precision = "bf16" (autocast)
    floor      bare compute: the same generate, one reference forward, the same epochs x minibatches of
               forward/backward/optimizer step, nothing else (no value head, no bookkeeping)
    naive      a deep-copied frozen reference model plus an extra policy forward for old log-probs and
               values, then the same reward and PPO update

Peak RSS is per process, so each variant's memory is measured in its own subprocess
(`bench.py --variant X --model DIR`, one step, ru_maxrss). All variants generate exactly 32 tokens: the
saved generation config sets min_new_tokens = max_new_tokens, and every variant calls the same generate.
"""

from __future__ import annotations

import argparse
import copy
import gc
import itertools
import json
import os
import platform
import random
import resource
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")

import numpy as np  # noqa: E402
import torch  # noqa: E402
from accelerate import Accelerator  # noqa: E402
from tokenizers import Tokenizer, models, pre_tokenizers, processors  # noqa: E402
from transformers import GenerationConfig, PreTrainedTokenizerFast, T5Config, T5ForConditionalGeneration  # noqa: E402
from trl.trainer.utils import selective_log_softmax  # noqa: E402

from alignrun import ppo, resources, rollout, trainer  # noqa: E402
from alignrun.config import Experiment  # noqa: E402
from alignrun.models import Policy, autocast, build_policy, set_threads  # noqa: E402
from alignrun.reward import load_scorer, reward_from_scores  # noqa: E402

PAD_ID, EOS_ID, UNK_ID = 0, 1, 2
PROMPTS, PROMPT_TOKENS, NEW_TOKENS, MINIBATCH, EPOCHS, RANK = 16, 64, 32, 8, 4, 8
VARIANTS = ("ours", "ours-bf16", "floor", "naive")
PARTS = ("generate", "old_logp", "reference", "reward", "update", "other")


@dataclass(frozen=True)
class Shape:
    d_model: int
    heads: int
    d_kv: int
    d_ff: int
    layers: int
    vocab: int


SHAPES = {
    "tiny": Shape(d_model=128, heads=4, d_kv=32, d_ff=512, layers=2, vocab=8000),  # ~2.1M parameters
    "small": Shape(d_model=512, heads=8, d_kv=64, d_ff=2048, layers=6, vocab=32128),  # T5-small-shaped, 60.5M
    "base": Shape(d_model=768, heads=12, d_kv=64, d_ff=3072, layers=12, vocab=32128),  # T5-base-shaped, 223M
}


def length_harm(texts: list[str]) -> list[float]:
    """The bench's reward backend: constant time per text, deterministic, in [0, 1]."""
    return [(len(t) % 10) / 10 for t in texts]


# ---------------------------------------------------------------------------------------- models and data


def invented_words(n: int, seed: int = 0) -> list[str]:
    """n distinct pronounceable non-words (three consonant-vowel syllables), shuffled by seed."""
    syllables = [c + v for c in "bdfgklmnprstvz" for v in "aeiou"]
    words = ["".join(p) for p in itertools.islice(itertools.product(syllables, repeat=3), n)]
    random.Random(seed).shuffle(words)
    return words


def build_model(shape: Shape, out: Path) -> Path:
    """A random T5 of the given shape with a WordLevel tokenizer whose vocabulary fills the embedding."""
    vocab = {"<pad>": PAD_ID, "</s>": EOS_ID, "<unk>": UNK_ID}
    vocab.update({w: i + 3 for i, w in enumerate(invented_words(shape.vocab - 3))})
    tok = Tokenizer(models.WordLevel(vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    tok.post_processor = processors.TemplateProcessing(single="$A </s>", special_tokens=[("</s>", EOS_ID)])
    tokenizer = PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="<pad>", eos_token="</s>", unk_token="<unk>",
                                        model_max_length=512, padding_side="right")
    config = T5Config(vocab_size=shape.vocab, d_model=shape.d_model, d_kv=shape.d_kv, num_heads=shape.heads,
                      d_ff=shape.d_ff, num_layers=shape.layers, num_decoder_layers=shape.layers, dropout_rate=0.0,
                      pad_token_id=PAD_ID, eos_token_id=EOS_ID, decoder_start_token_id=PAD_ID)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        model = T5ForConditionalGeneration(config).eval()
    # exactly NEW_TOKENS tokens per reply for every variant (they all call generate with this config)
    model.generation_config = GenerationConfig(decoder_start_token_id=PAD_ID, pad_token_id=PAD_ID,
                                               eos_token_id=EOS_ID, min_new_tokens=NEW_TOKENS)
    model.save_pretrained(out)
    tokenizer.save_pretrained(out)
    return out


def bench_prompts(vocab: int, seed: int = 1) -> list[str]:
    """PROMPTS prompts of PROMPT_TOKENS tokens each (PROMPT_TOKENS - 1 words plus </s>)."""
    words = invented_words(vocab - 3)
    rng = random.Random(seed)
    return [" ".join(rng.choices(words, k=PROMPT_TOKENS - 1)) for _ in range(PROMPTS)]


def experiment(model: Path, precision: str = "fp32", reference: str = "adapters-off",
               epochs: int = EPOCHS) -> Experiment:
    return Experiment.model_validate({
        "base": {"model": str(model), "device": "cpu", "precision": precision},
        "lora": {"rank": RANK},
        "reference": {"mode": reference},
        "reward": {"backend": "callable", "source": "bench:length_harm"},
        "ppo": {"prompts_per_step": PROMPTS, "minibatch": MINIBATCH, "epochs": epochs},
        "generation": {"max_new_tokens": NEW_TOKENS, "max_prompt_tokens": PROMPT_TOKENS},
        "data": {"prompts": "unused-by-the-bench"},
        "evaluation": {"judge": None},
    })


# ---------------------------------------------------------------------------------------- the variants


class Clock:
    """Named wall-clock totals; `part` times a block, `wrap` times every call of a module function."""

    def __init__(self) -> None:
        self.totals: dict[str, float] = defaultdict(float)

    @contextmanager
    def part(self, name: str) -> Iterator[None]:
        start = time.perf_counter()
        try:
            yield
        finally:
            self.totals[name] += time.perf_counter() - start

    def wrap(self, module: Any, attr: str, name: str) -> None:
        original: Callable[..., Any] = getattr(module, attr)

        def timed(*args: Any, **kwargs: Any) -> Any:
            with self.part(name):
                return original(*args, **kwargs)

        setattr(module, attr, timed)

    def take(self) -> dict[str, float]:
        out, self.totals = dict(self.totals), defaultdict(float)
        return out


CLOCK = Clock()


def plain_generate(policy: Policy, ids: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """The same sampling call as rollout.sample, without asking for logits or hidden states."""
    return policy.lm.generate(input_ids=ids, attention_mask=mask, max_new_tokens=NEW_TOKENS, num_beams=1,
                              do_sample=True, temperature=1.0, top_k=0, top_p=1.0,
                              pad_token_id=policy.tokenizer.pad_token_id, eos_token_id=policy.tokenizer.eos_token_id)


@dataclass
class Setup:
    cfg: Experiment
    policy: Policy
    net: torch.nn.Module
    optimizer: torch.optim.Optimizer
    accelerator: Accelerator
    scorer: Any
    controller: ppo.KLController
    prompts: list[str]


def make_setup(cfg: Experiment, prompts: list[str], accelerator: Accelerator, policy: Policy | None = None,
               floor: bool = False) -> Setup:
    """A policy (built by the real build_policy unless given), its optimizer, scorer and KL controller."""
    device = torch.device("cpu")
    policy = policy or build_policy(cfg.base, cfg.lora, cfg.reference, device)
    module = policy.lm if floor else policy.net
    optimizer = torch.optim.AdamW([p for p in module.parameters() if p.requires_grad], lr=cfg.ppo.learning_rate)
    net, optimizer = accelerator.prepare(policy.net, optimizer)
    return Setup(cfg, policy, net, optimizer, accelerator, load_scorer(cfg.reward, "reward"),
                 ppo.KLController(beta=cfg.kl.coef), prompts)


def ours_step(s: Setup, step: int) -> dict[str, float]:
    row = trainer.train_step(s.policy, s.net, s.optimizer, s.accelerator, s.scorer, s.controller, s.prompts, s.cfg,
                             step, torch.device("cpu"))
    parts = CLOCK.take()
    return {**parts, "reward": row["reward_s"], "step": row["step_s"]}


def floor_step(s: Setup, step: int) -> dict[str, float]:
    """Bare compute: generate, one reference forward, epochs x minibatches of forward/backward/step."""
    lm, p = s.policy.lm, s.cfg.ppo
    ids, mask = rollout.encode_prompts(s.policy.tokenizer, s.prompts, PROMPT_TOKENS, torch.device("cpu"))
    start = time.perf_counter()
    with CLOCK.part("generate"), torch.no_grad():
        seq = plain_generate(s.policy, ids, mask)
    decoder_input, response = seq[:, :-1], seq[:, 1:]
    with CLOCK.part("reference"), torch.no_grad(), lm.disable_adapter():
        selective_log_softmax(lm(input_ids=ids, attention_mask=mask, decoder_input_ids=decoder_input,
                                 use_cache=False).logits, response)
    gen = torch.Generator().manual_seed(step)
    with CLOCK.part("update"):
        for _ in range(p.epochs):
            for idx in torch.randperm(len(s.prompts), generator=gen).split(p.minibatch):
                logits = lm(input_ids=ids[idx], attention_mask=mask[idx], decoder_input_ids=decoder_input[idx],
                            use_cache=False).logits
                loss = -selective_log_softmax(logits, response[idx]).mean()
                s.optimizer.zero_grad(set_to_none=True)
                loss.backward()
                s.optimizer.step()
    return {**CLOCK.take(), "step": time.perf_counter() - start}


def naive_step(s: Setup, step: int) -> dict[str, float]:
    """A straightforward loop: plain generate, a policy forward for old log-probs and values, a reference
    forward through a separate deep-copied model, then the same reward, advantages and PPO update as ours."""
    policy, cfg, device = s.policy, s.cfg, torch.device("cpu")
    assert policy.reference_copy is not None
    tok = policy.tokenizer
    start = time.perf_counter()
    ids, mask = rollout.encode_prompts(tok, s.prompts, PROMPT_TOKENS, device)
    with CLOCK.part("generate"), torch.no_grad():
        seq = plain_generate(policy, ids, mask)
    decoder_input = seq[:, :-1]
    response_mask = rollout.response_mask(seq[:, 1:], tok.eos_token_id)
    response = torch.where(response_mask.bool(), seq[:, 1:], torch.full_like(seq[:, 1:], tok.pad_token_id))
    with CLOCK.part("old_logp"), torch.no_grad():
        logits, values = s.net(ids, mask, decoder_input)
        logp = selective_log_softmax(logits.float(), response)
    ref_logp = rollout.reference_logprobs(policy, ids, mask, decoder_input, response)  # timed by instrument()
    texts = [t.strip() for t in tok.batch_decode(response, skip_special_tokens=True)]
    ro = rollout.Rollout(ids, mask, decoder_input, response, response_mask, logp * response_mask,
                         ref_logp * response_mask, values.float() * response_mask, texts)
    with CLOCK.part("reward"):
        reward = torch.tensor(reward_from_scores(s.scorer.score(texts), cfg.reward), dtype=torch.float32)
    rewards, kl = ppo.penalised_rewards(reward, ro.logp, ro.ref_logp, response_mask, s.controller.beta)
    advantages, returns = ppo.gae(rewards, ro.values, response_mask, cfg.ppo.gamma, cfg.ppo.gae_lambda)
    advantages = ppo.whiten(advantages, response_mask)
    with CLOCK.part("update"):
        UNTIMED_PPO_UPDATE(s.net, s.optimizer, s.accelerator, ro, advantages, returns, cfg, step, device)
    s.controller.update(float(kl.sum(dim=1).mean()))
    return {**CLOCK.take(), "step": time.perf_counter() - start}


UNTIMED_PPO_UPDATE = trainer.ppo_update
STEPS: dict[str, Callable[[Setup, int], dict[str, float]]] = {
    "ours": ours_step, "ours-bf16": ours_step, "floor": floor_step, "naive": naive_step,
}


def instrument() -> None:
    """Time the real rollout and update functions from inside train_step (the bench process only)."""
    CLOCK.wrap(rollout, "sample", "generate")
    CLOCK.wrap(rollout, "reference_logprobs", "reference")
    CLOCK.wrap(trainer, "ppo_update", "update")


def breakdown(raw: dict[str, float]) -> dict[str, float]:
    """generate / old_logp / reference / reward / update / other (= step minus the named parts) / step."""
    out = {part: raw.get(part, 0.0) for part in PARTS if part != "other"}
    out["other"] = max(0.0, raw["step"] - sum(out.values()))
    out["step"] = raw["step"]
    return out


def variant_cfg(model: Path, variant: str, epochs: int = EPOCHS) -> Experiment:
    return experiment(model, precision="bf16" if variant == "ours-bf16" else "fp32",
                      reference="copy" if variant == "naive" else "adapters-off", epochs=epochs)


# ---------------------------------------------------------------------------------------- measurements


def time_shape(model: Path, vocab: int) -> dict[str, dict[str, float]]:
    """One process: build ours (shared by ours-bf16 and floor) and naive, warm each up, then time one step each."""
    accelerator = Accelerator(cpu=True)
    prompts = bench_prompts(vocab)
    ours = make_setup(variant_cfg(model, "ours"), prompts, accelerator)
    setups = {
        "ours": ours,
        "ours-bf16": make_setup(variant_cfg(model, "ours-bf16"), prompts, accelerator, policy=ours.policy),
        "floor": make_setup(variant_cfg(model, "floor"), prompts, accelerator, policy=ours.policy, floor=True),
        "naive": make_setup(variant_cfg(model, "naive"), prompts, accelerator),
    }
    for name, setup in setups.items():  # warm-up: one step of one epoch per variant (same kernels and shapes)
        STEPS[name](with_epochs(setup, 1), 0)
    torch.manual_seed(0)
    return {name: breakdown(STEPS[name](setup, 1)) for name, setup in setups.items()}


def with_epochs(setup: Setup, epochs: int) -> Setup:
    cfg = setup.cfg.model_copy(update={"ppo": setup.cfg.ppo.model_copy(update={"epochs": epochs})})
    return Setup(**{**setup.__dict__, "cfg": cfg})


def memory_child(model: Path, variant: str, epochs: int) -> dict[str, float]:
    """Run in a fresh process: build the variant, run one step, report peak RSS and the step time."""
    accelerator = Accelerator(cpu=True)
    cfg = variant_cfg(model, variant, epochs)
    prompts = bench_prompts(cfg_vocab(model))
    setup = make_setup(cfg, prompts, accelerator, floor=variant == "floor")
    row = breakdown(STEPS[variant](setup, 0))
    return {"peak_rss_mb": own_peak_rss_mb(), "step_s": row["step"]}


def own_peak_rss_mb() -> float:
    """This process's own peak RSS (VmHWM). Not ru_maxrss: Linux carries the parent's RSS at fork over exec."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024  # kB
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def cfg_vocab(model: Path) -> int:
    return int(json.loads((model / "config.json").read_text())["vocab_size"])


def measure_memory(model: Path, variant: str, epochs: int) -> dict[str, float]:
    cmd = [sys.executable, __file__, "--child", variant, "--model", str(model), "--epochs", str(epochs),
           "--threads", str(torch.get_num_threads())]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"memory run {variant} on {model} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def bf16_logprob_check(model: Path, vocab: int) -> dict[str, float]:
    """fp32 vs bf16 autocast: teacher-forced log-probs of the same sampled replies, per real token."""
    cfg = variant_cfg(model, "ours")
    policy = build_policy(cfg.base, cfg.lora, cfg.reference, torch.device("cpu"))
    torch.manual_seed(0)
    ro = rollout.rollout(policy, bench_prompts(vocab), PROMPT_TOKENS, NEW_TOKENS, torch.device("cpu"))
    out = {}
    with torch.no_grad():
        for precision in ("fp32", "bf16"):
            with autocast(precision, torch.device("cpu")):
                logits, _ = policy.net(ro.prompt_ids, ro.prompt_mask, ro.decoder_input)
            out[precision] = selective_log_softmax(logits.float(), ro.response_ids)
    mask = ro.response_mask.bool()
    diff = (out["bf16"] - out["fp32"])[mask].abs()
    return {"tokens": int(mask.sum()), "mean_abs_logp_diff": float(diff.mean()),
            "max_abs_logp_diff": float(diff.max()), "mean_logp_fp32": float(out["fp32"][mask].mean()),
            "seq_logp_max_abs_diff": float(((out["bf16"] - out["fp32"]) * ro.response_mask).sum(1).abs().max())}


# ---------------------------------------------------------------------------------------- report


def ratio(a: float, b: float) -> float:
    return a / b if b else float("nan")


def summarise(results: dict[str, Any]) -> dict[str, dict[str, float]]:
    out = {}
    for name, r in results["shapes"].items():
        t, m = r["time"], r.get("memory", {})
        row = {"ours/floor": ratio(t["ours"]["step"], t["floor"]["step"]),
               "ours/naive": ratio(t["ours"]["step"], t["naive"]["step"]),
               "bf16/fp32-floor": ratio(t["ours-bf16"]["step"], t["floor"]["step"])}
        if m:
            row["rss ours/naive"] = ratio(m["ours"]["peak_rss_mb"], m["naive"]["peak_rss_mb"])
        est = r["estimate"]
        row["est/meas step"] = ratio(est["seconds_per_step"], t["ours"]["step"])
        if m:
            row["est/meas rss"] = ratio(est["peak_mb"], m["ours"]["peak_rss_mb"])
        out[name] = row
    return out


TARGETS = {"ours/floor": 1.10, "ours/naive": 0.85, "bf16/fp32-floor": 0.65}


def print_tables(results: dict[str, Any]) -> None:
    summary = results["summary"]
    print("\nratios (targets: ours/floor <= 1.10, ours/naive <= 0.85, bf16/fp32-floor <= 0.65, "
          "rss ours/naive <= 0.60 on base; estimate within 0.70-1.30)")
    cols = ["ours/floor", "ours/naive", "bf16/fp32-floor", "rss ours/naive", "est/meas step", "est/meas rss"]
    print(f"{'shape':<7}{'params':>9}" + "".join(f"{c:>17}" for c in cols))
    for name, row in summary.items():
        params = results["shapes"][name]["estimate"]["total_params"] / 1e6
        print(f"{name:<7}{params:>8.1f}M" + "".join(f"{row.get(c, float('nan')):>17.2f}" for c in cols))
    print("\nseconds per step (one step after a one-epoch warm-up; other = step minus the named parts) and peak RSS")
    print(f"{'shape':<7}{'variant':<10}" + "".join(f"{p:>10}" for p in (*PARTS, "step")) + f"{'peak MB':>10}")
    for name, r in results["shapes"].items():
        for variant in VARIANTS:
            t = r["time"][variant]
            rss = r.get("memory", {}).get(variant, {}).get("peak_rss_mb", float("nan"))
            print(f"{name:<7}{variant:<10}" + "".join(f"{t[p]:>10.2f}" for p in (*PARTS, "step")) + f"{rss:>10.0f}")
    print("\nestimate (alignrun.resources.estimate) vs measured (ours, fp32)")
    print(f"{'shape':<7}{'total':>12}{'trainable':>11}{'est s':>8}{'meas s':>8}{'est MB':>8}{'meas MB':>9}")
    for name, r in results["shapes"].items():
        e = r["estimate"]
        rss = r.get("memory", {}).get("ours", {}).get("peak_rss_mb", float("nan"))
        print(f"{name:<7}{e['total_params']:>12,}{e['trainable_params']:>11,}{e['seconds_per_step']:>8.2f}"
              f"{r['time']['ours']['step']:>8.2f}{e['peak_mb']:>8.0f}{rss:>9.0f}")
    c = results["bf16_check"]
    print(f"\nbf16 vs fp32 log-probs on the tiny model's rollout ({c['tokens']} tokens): mean |diff| "
          f"{c['mean_abs_logp_diff']:.4f}, max {c['max_abs_logp_diff']:.4f} nats (mean log-prob "
          f"{c['mean_logp_fp32']:.2f}); largest per-reply sum |diff| {c['seq_logp_max_abs_diff']:.3f}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--shapes", default="tiny,small,base", help="comma-separated, from: " + ", ".join(SHAPES))
    ap.add_argument("--out", default="bench-results/bench.json", help="where the JSON results go")
    ap.add_argument("--no-memory", action="store_true", help="skip the per-variant peak-RSS subprocesses")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0: all cores)")
    ap.add_argument("--memory-epochs", type=int, default=1,
                    help="PPO epochs in the memory runs (activations are freed per minibatch, so 1 shows the peak)")
    ap.add_argument("--child", choices=VARIANTS, help=argparse.SUPPRESS)
    ap.add_argument("--model", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--epochs", type=int, default=EPOCHS, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    set_threads(args.threads)
    import transformers

    transformers.utils.logging.set_verbosity_error()
    if args.child:
        instrument()
        print(json.dumps(memory_child(args.model, args.child, args.epochs)))
        return 0
    shapes = [s.strip() for s in args.shapes.split(",") if s.strip()]
    unknown = [s for s in shapes if s not in SHAPES]
    if unknown:
        ap.error(f"unknown shape(s) {', '.join(unknown)}; choose from {', '.join(SHAPES)}")
    instrument()
    started = time.perf_counter()
    results: dict[str, Any] = {
        "setup": {"prompts": PROMPTS, "prompt_tokens": PROMPT_TOKENS, "new_tokens": NEW_TOKENS,
                  "minibatch": MINIBATCH, "epochs": EPOCHS, "lora_rank": RANK, "lora_targets": "q,v",
                  "memory_epochs": args.memory_epochs, "threads": torch.get_num_threads(),
                  "omp_wait_policy": os.environ.get("OMP_WAIT_POLICY", "(unset)"),
                  "torch": torch.__version__, "platform": platform.platform(),
                  "load_average_start": os.getloadavg()},
        "fast_settings": resources.fast_settings(), "shapes": {},
    }
    with tempfile.TemporaryDirectory(prefix="alignrun-bench-") as tmp:
        for name in shapes:
            shape = SHAPES[name]
            print(f"[{time.perf_counter() - started:6.0f}s] {name}: building the model", flush=True)
            model = build_model(shape, Path(tmp) / name)
            entry: dict[str, Any] = {"shape": asdict(shape),
                                     "estimate": asdict(resources.estimate(variant_cfg(model, "ours")))}
            print(f"[{time.perf_counter() - started:6.0f}s] {name}: timing ours, ours-bf16, floor, naive", flush=True)
            entry["time"] = time_shape(model, shape.vocab)
            gc.collect()
            if not args.no_memory:
                print(f"[{time.perf_counter() - started:6.0f}s] {name}: peak RSS per variant", flush=True)
                entry["memory"] = {v: measure_memory(model, v, args.memory_epochs) for v in VARIANTS}
            results["shapes"][name] = entry
            if name == shapes[0]:  # the smallest shape asked for: tiny by default
                results["bf16_check"] = bf16_logprob_check(model, shape.vocab)
    results["summary"] = summarise(results)
    results["setup"]["load_average_end"] = os.getloadavg()
    results["setup"]["wall_s"] = time.perf_counter() - started
    print_tables(results)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(results, indent=2, default=float) + "\n")
    print(f"\nwrote {out} ({results['setup']['wall_s']:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
