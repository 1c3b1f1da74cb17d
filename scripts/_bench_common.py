"""What every benchmark script shares: offline start-up, the machine description, random bench models, timing
and CPU-time helpers, and writing results as strict JSON.

Import it first (before torch): it makes the scripts offline and puts this checkout's alignrun on the path.
"""

from __future__ import annotations

import itertools
import json
import os
import platform
import random
import resource
import sys
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
sys.path.insert(1, str(Path(__file__).resolve().parent.parent))  # alignrun, when it is not installed

import torch  # noqa: E402
from tokenizers import Tokenizer, models, pre_tokenizers, processors  # noqa: E402
from transformers import (  # noqa: E402
    GenerationConfig,
    LlamaConfig,
    LlamaForCausalLM,
    PreTrainedTokenizerFast,
    T5Config,
    T5ForConditionalGeneration,
)

from alignrun import (
    budget,  # noqa: E402
    cpu,  # noqa: E402  (imports no torch)
)

PAD_ID, EOS_ID, UNK_ID = 0, 1, 2
PROMPTS, PROMPT_TOKENS, NEW_TOKENS = 16, 64, 32  # one step's batch: prompts x prompt tokens -> new tokens


def quiet_transformers() -> None:
    import transformers

    transformers.utils.logging.set_verbosity_error()
    transformers.utils.logging.disable_progress_bar()


def set_bench_threads(threads: int) -> str:
    """Threads as `alignrun run` chooses them (threads = 0: alignrun.cpu's choice); returns the reason."""
    from alignrun.models import set_threads

    return set_threads(threads).reason


def machine() -> dict[str, Any]:
    """What a figure depends on: CPU, torch, threads, OpenMP policy, native or emulated bf16, machine load."""
    return {
        "platform": platform.platform(), "torch": torch.__version__, "threads": torch.get_num_threads(),
        "omp_wait_policy": os.environ.get("OMP_WAIT_POLICY", "(unset)"),
        "cpu_capability": torch.backends.cpu.get_cpu_capability(), "native_bf16": budget.native_bf16(),
        "simulated_isa": {k: os.environ[k] for k in SIMULATION_ENV if k in os.environ} or None,
        "affinity_cpus": len(cpu.affinity_cpus()), "cgroup_cpu_quota": cpu.cgroup_cpu_quota(),
        "load_average_start": os.getloadavg(),
    }


# Environment variables that make torch, oneDNN and MKL use AVX2 code only: an AVX2 machine, simulated.
SIMULATION_ENV = ("ATEN_CPU_CAPABILITY", "ONEDNN_MAX_CPU_ISA", "MKL_ENABLE_INSTRUCTIONS")


def cpu_seconds() -> float:
    """This process's CPU time (all threads), user plus system."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def timed(run: Callable[[], Any]) -> tuple[float, float]:
    """(wall seconds, CPU seconds) of one call."""
    wall, used = time.perf_counter(), cpu_seconds()
    run()
    return time.perf_counter() - wall, cpu_seconds() - used


def ratio(a: float, b: float) -> float:
    return a / b if b else float("nan")


class Log:
    """Progress lines with the seconds since the script started."""

    def __init__(self) -> None:
        self.started = time.perf_counter()

    def elapsed(self) -> float:
        return time.perf_counter() - self.started

    def __call__(self, message: str) -> None:
        print(f"[{self.elapsed():6.0f}s] {message}", flush=True)


def _no_nan(value: Any) -> Any:
    """Strict JSON: ratios that could not be formed (a variant not measured) become null."""
    if isinstance(value, dict):
        return {k: _no_nan(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_no_nan(v) for v in value]
    return None if isinstance(value, float) and value != value else value


def write_results(path: str | Path, results: dict[str, Any]) -> Path:
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(_no_nan(results), indent=2, allow_nan=False) + "\n")
    return out


# ---------------------------------------------------------------------------------------- bench models


@dataclass(frozen=True)
class Shape:
    d_model: int
    heads: int
    d_kv: int
    d_ff: int
    layers: int
    vocab: int
    arch: str = "t5"  # which builder in BUILDERS makes it


SHAPES = {
    "tiny": Shape(d_model=128, heads=4, d_kv=32, d_ff=512, layers=2, vocab=8000),  # 2.0M parameters
    "small": Shape(d_model=512, heads=8, d_kv=64, d_ff=2048, layers=6, vocab=32128),  # T5-small-shaped, 60.5M
    "base": Shape(d_model=768, heads=12, d_kv=64, d_ff=3072, layers=12, vocab=32128),  # T5-base-shaped, 223M
    # decoder-only, about T5-small's size: 14 layers x 3.2M + 16.4M tied embeddings = 61.3M (d_ff: SwiGLU width)
    "causal": Shape(d_model=512, heads=8, d_kv=64, d_ff=1408, layers=14, vocab=32128, arch="llama"),
}


def length_harm(texts: list[str]) -> list[float]:
    """The bench's reward backend (REWARD_SOURCE): constant time per text, in [0, 1]."""
    return [(len(t) % 10) / 10 for t in texts]


REWARD_SOURCE = "_bench_common:length_harm"


def invented_words(n: int, seed: int = 0) -> list[str]:
    """n distinct pronounceable non-words (three consonant-vowel syllables), shuffled by seed."""
    syllables = [c + v for c in "bdfgklmnprstvz" for v in "aeiou"]
    words = ["".join(p) for p in itertools.islice(itertools.product(syllables, repeat=3), n)]
    random.Random(seed).shuffle(words)
    return words


def word_tokenizer(vocab_size: int) -> PreTrainedTokenizerFast:
    """A WordLevel tokenizer over invented words whose vocabulary fills `vocab_size` ids."""
    vocab = {"<pad>": PAD_ID, "</s>": EOS_ID, "<unk>": UNK_ID}
    vocab.update({w: i + 3 for i, w in enumerate(invented_words(vocab_size - 3))})
    tok = Tokenizer(models.WordLevel(vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    tok.post_processor = processors.TemplateProcessing(single="$A </s>", special_tokens=[("</s>", EOS_ID)])
    return PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="<pad>", eos_token="</s>", unk_token="<unk>",
                                   model_max_length=512, padding_side="right")


def build_t5(shape: Shape, out: Path) -> Path:
    """A random T5 of the given shape; it generates exactly NEW_TOKENS tokens per reply (min_new_tokens)."""
    config = T5Config(vocab_size=shape.vocab, d_model=shape.d_model, d_kv=shape.d_kv, num_heads=shape.heads,
                      d_ff=shape.d_ff, num_layers=shape.layers, num_decoder_layers=shape.layers,
                      dropout_rate=0.0, pad_token_id=PAD_ID, eos_token_id=EOS_ID, decoder_start_token_id=PAD_ID)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        model = T5ForConditionalGeneration(config).eval()
    model.generation_config = GenerationConfig(decoder_start_token_id=PAD_ID, pad_token_id=PAD_ID,
                                               eos_token_id=EOS_ID, min_new_tokens=NEW_TOKENS)
    model.save_pretrained(out)
    word_tokenizer(shape.vocab).save_pretrained(out)
    return out


def build_llama(shape: Shape, out: Path) -> Path:
    """A random Llama of the shape, with the same tokenizer (a prompt ending in </s> is still one prompt)."""
    config = LlamaConfig(vocab_size=shape.vocab, hidden_size=shape.d_model, intermediate_size=shape.d_ff,
                         num_hidden_layers=shape.layers, num_attention_heads=shape.heads,
                         num_key_value_heads=shape.heads, tie_word_embeddings=True, pad_token_id=PAD_ID,
                         eos_token_id=EOS_ID, bos_token_id=None, max_position_embeddings=512)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        model = LlamaForCausalLM(config).eval()
    model.generation_config = GenerationConfig(pad_token_id=PAD_ID, eos_token_id=EOS_ID, min_new_tokens=NEW_TOKENS)
    model.save_pretrained(out)
    word_tokenizer(shape.vocab).save_pretrained(out)
    return out


BUILDERS: dict[str, Callable[[Shape, Path], Path]] = {"t5": build_t5, "llama": build_llama}  # a new architecture: a builder here


def build_model(shape: Shape, out: Path) -> Path:
    """A random model of `shape` saved as a Hugging Face folder with its tokenizer."""
    return BUILDERS[shape.arch](shape, out)


def shape_table(names: list[str]) -> dict[str, dict[str, Any]]:
    return {name: asdict(SHAPES[name]) for name in names}


def model_vocab(model: Path) -> int:
    return int(json.loads((model / "config.json").read_text())["vocab_size"])


def bench_prompts(vocab: int, seed: int = 1) -> list[str]:
    """PROMPTS prompts of PROMPT_TOKENS tokens each (PROMPT_TOKENS - 1 words plus </s>)."""
    words = invented_words(vocab - 3)
    rng = random.Random(seed)
    return [" ".join(rng.choices(words, k=PROMPT_TOKENS - 1)) for _ in range(PROMPTS)]
