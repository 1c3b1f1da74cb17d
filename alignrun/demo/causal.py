"""The demo's decoder-only variant: the same invented scenario, tokenizer vocabulary and classifier, with a small
Llama-shaped causal LM as the base. Also the tiny random GPT-2 and Llama models the tests use.

A causal LM reads the prompt and writes the reply in one sequence: "<s> prompt |" then "reply </s>". The tokenizer
is the demo's own with two changes for that: it starts encodings with <s> instead of ending them with </s> (an
EOS after the prompt would end the text before the reply), and it carries a one-turn chat template that writes
the same text, so base.prompt_format = "chat" and "plain" (with SEPARATOR) give identical prompts.
"""

from __future__ import annotations

import hashlib
import random
from dataclasses import asdict, dataclass
from pathlib import Path

import torch
from tokenizers import processors
from transformers import (
    AutoTokenizer,
    GenerationConfig,
    GPT2Config,
    GPT2LMHeadModel,
    LlamaConfig,
    LlamaForCausalLM,
    PreTrainedModel,
)

from alignrun.demo import scenario
from alignrun.demo.build import (
    BOS_ID,
    EOS_ID,
    PAD_ID,
    BaseRecipe,
    DemoPaths,
    _batches,
    _ensure,
    _log,
    _torch_settings,
    build_demo,
    build_threads,
    fit,
    read_fingerprint,
)

SEPARATOR = " |"  # between prompt and reply: base.prompt_separator in configs/causal-demo.toml
CHAT_TEMPLATE = ("{% for m in messages %}{{ bos_token }}{{ m['content'] }}{% endfor %}"
                 f"{{% if add_generation_prompt %}}{SEPARATOR}{{% endif %}}")


@dataclass(frozen=True)
class CausalRecipe:
    """The decoder-only demo base: a small Llama trained on the seq2seq base's pairs, loss on reply tokens only."""

    layers: int = 3
    hidden: int = 128
    heads: int = 4
    intermediate: int = 384
    steps: int = 1000
    batch_size: int = 32
    learning_rate: float = 1e-2
    warmup_steps: int = 30


def causal_tokenizer(tokenizer_dir: Path, out: Path) -> Path:
    """The demo tokenizer as a causal LM reads it: <s> first, no </s> appended, the one-turn chat template."""
    tok = AutoTokenizer.from_pretrained(tokenizer_dir)
    tok.backend_tokenizer.post_processor = processors.TemplateProcessing(
        single="<s> $A", pair="<s> $A $B", special_tokens=[("<s>", BOS_ID)])
    tok.chat_template = CHAT_TEMPLATE
    tok.save_pretrained(out)
    return Path(out)


def _generation_config(max_new_tokens: int) -> GenerationConfig:
    return GenerationConfig(bos_token_id=BOS_ID, pad_token_id=PAD_ID, eos_token_id=EOS_ID,
                            max_new_tokens=max_new_tokens)


def _llama_config(vocab: int, hidden: int, heads: int, intermediate: int, layers: int) -> LlamaConfig:
    return LlamaConfig(vocab_size=vocab, hidden_size=hidden, intermediate_size=intermediate,
                       num_hidden_layers=layers, num_attention_heads=heads, num_key_value_heads=heads,
                       max_position_embeddings=256, tie_word_embeddings=True, attention_dropout=0.0,
                       pad_token_id=PAD_ID, bos_token_id=BOS_ID, eos_token_id=EOS_ID)


def build_tiny_causal(out: Path, arch: str, tokenizer_dir: Path, seed: int = 0) -> Path:
    """A randomly initialised tiny GPT-2 or Llama (a few hundred K parameters) saved with the causal tokenizer."""
    out = Path(out)
    tokenizer = AutoTokenizer.from_pretrained(causal_tokenizer(tokenizer_dir, out))
    vocab = len(tokenizer)
    if arch == "gpt2":
        config: GPT2Config | LlamaConfig = GPT2Config(
            vocab_size=vocab, n_embd=64, n_layer=2, n_head=4, n_positions=256, resid_pdrop=0.0, embd_pdrop=0.0,
            attn_pdrop=0.0, bos_token_id=BOS_ID, eos_token_id=EOS_ID)
        model_cls: type[PreTrainedModel] = GPT2LMHeadModel
    elif arch == "llama":
        config = _llama_config(vocab, hidden=64, heads=4, intermediate=128, layers=2)
        model_cls = LlamaForCausalLM
    else:
        raise ValueError(f"arch must be 'gpt2' or 'llama', got {arch!r}")
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        model = model_cls(config).eval()
    model.generation_config = _generation_config(max_new_tokens=16)
    model.save_pretrained(out)
    return out


def train_causal_base(out: Path, tokenizer_dir: Path, recipe: CausalRecipe, pairs_recipe: BaseRecipe, seed: int,
                      quiet: bool = False) -> dict[str, float]:
    """Next-token training of a small Llama on the scenario pairs "<s> prompt |" + "reply </s>"; the loss covers
    the reply tokens only, as the seq2seq base is trained on replies only."""
    tokenizer = AutoTokenizer.from_pretrained(causal_tokenizer(tokenizer_dir, out))
    pairs = scenario.base_pairs(pairs_recipe.pairs, seed, pairs_recipe.rude_share)
    prompts = tokenizer([p.prompt + SEPARATOR for p in pairs]).input_ids
    replies = tokenizer([p.reply for p in pairs], add_special_tokens=False).input_ids
    rows = [(a, b + [EOS_ID]) for a, b in zip(prompts, replies)]
    reply_tokens = torch.tensor([len(b) for _, b in rows], dtype=torch.float)
    config = _llama_config(len(tokenizer), recipe.hidden, recipe.heads, recipe.intermediate, recipe.layers)
    torch.manual_seed(seed)
    model = LlamaForCausalLM(config)
    norm = recipe.batch_size * float(reply_tokens.mean())  # every reply token weighs the same (see build.train_base)
    batches = _batches([len(a) + len(b) for a, b in rows], recipe.batch_size, random.Random(f"causal-batches:{seed}"),
                       window=16)
    _log(f"training causal base Llama ({sum(p.numel() for p in model.parameters()) / 1e6:.2f}M parameters, "
         f"{len(pairs)} pairs, {recipe.steps} steps)")

    def batch_loss(idx: list[int]) -> torch.Tensor:
        width = max(len(rows[i][0]) + len(rows[i][1]) for i in idx)
        ids = torch.full((len(idx), width), PAD_ID)
        labels = torch.full((len(idx), width), -100)
        for r, i in enumerate(idx):  # right padding: positions count from 0 in every row
            a, b = rows[i]
            ids[r, : len(a) + len(b)] = torch.tensor(a + b)
            labels[r, len(a): len(a) + len(b)] = torch.tensor(b)
        lengths = torch.tensor([len(rows[i][0]) + len(rows[i][1]) for i in idx])
        logits = model(input_ids=ids, attention_mask=(torch.arange(width) < lengths[:, None]).long()).logits
        return torch.nn.functional.cross_entropy(logits[:, :-1].flatten(0, 1), labels[:, 1:].flatten(),
                                                 ignore_index=-100, reduction="sum") / norm

    final_loss = fit(model, batch_loss, batches, recipe.steps, recipe.learning_rate, recipe.warmup_steps,
                     "causal base", quiet)
    model.generation_config = _generation_config(pairs_recipe.max_reply_tokens)
    model.save_pretrained(out)
    return {"final_loss": final_loss}


def build_causal_demo(cache: Path | None = None, seed: int = 0, quiet: bool = False) -> DemoPaths:
    """build_demo's folders, plus causal-base/ beside base/; DemoPaths.base is the causal base."""
    paths = build_demo(cache, seed, quiet)
    recipe, pairs = CausalRecipe(), BaseRecipe()
    folder = paths.root / "causal-base"
    threads = build_threads()
    with _torch_settings(threads):
        _ensure("causal base model", folder, {"artefact": "causal-base", "seed": seed, "threads": threads,
                                              **asdict(recipe),
                                              "pairs": pairs.pairs, "rude_share": pairs.rude_share,
                                              "builder": hashlib.sha256(Path(__file__).read_bytes()).hexdigest(),
                                              "tokenizer": read_fingerprint(paths.tokenizer)},
                lambda tmp: train_causal_base(tmp, paths.tokenizer, recipe, pairs, seed, quiet))
    return DemoPaths(paths.root, paths.tokenizer, folder, paths.classifier, paths.prompts, paths.heldout)
