"""Builders for the offline demo: tokenizer, tiny seq2seq models, the demo base model and harm classifier.

Everything is deterministic for a seed and the build's fixed thread count (`build_threads`) and saved as standard
Hugging Face folders (safetensors).
`build_demo` caches each artefact in its own folder with a fingerprint of the builder's inputs and
rebuilds a folder only when that fingerprint changes; each folder is built aside and renamed into place.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import random
import shutil
import string
import sys
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import psutil
import torch
from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, processors, trainers
from transformers import (
    AutoTokenizer,
    BartConfig,
    BartForConditionalGeneration,
    BertConfig,
    BertForSequenceClassification,
    GenerationConfig,
    PreTrainedTokenizerFast,
    T5Config,
    T5ForConditionalGeneration,
)

from alignrun.console import progress
from alignrun.cpu import choose_threads
from alignrun.demo import scenario
from alignrun.errors import UserError

SPECIAL_TOKENS = ("<pad>", "</s>", "<unk>", "<s>", "<mask>")  # ids 0..4 in every tokenizer built here
PAD_ID, EOS_ID, BOS_ID = (SPECIAL_TOKENS.index(t) for t in ("<pad>", "</s>", "<s>"))
STAMP = "demo-build.json"
CLASSIFIER_LABELS = {0: "civil", 1: "hostile"}


@dataclass(frozen=True)
class DemoPaths:
    root: Path
    tokenizer: Path
    base: Path
    classifier: Path
    prompts: Path  # JSONL, field "prompt"
    heldout: Path  # JSONL, field "prompt"


@dataclass(frozen=True)
class BaseRecipe:
    """The demo base: a small T5 trained with teacher forcing on scenario pairs (a), no dropout.

    Each pair is seen once (pairs = steps * batch_size). Measured while choosing it (share of greedy replies
    that fit their prompt, 200 prompts): 6000 pairs seen five times at learning rate 1e-2 with 4 heads of 32
    fitted 7% of held-out prompts and 12% of training ones; 3e-3 ended at a lower loss; 8 heads of 16 instead of
    4 of 32 fitted 99% instead of 76% of training prompts after 1000 steps; the weight average added about ten
    points on held-out prompts part-way through training; a sentence of another phrasing joined to half the
    prompts raised held-out fit from 83% to 92% on average over seeds 0-3 (one thread; training 88% to 95%, probe
    68% to 75%), with more spread between seeds than between recipes for most other changes tried.
    """

    pairs: int = 25600
    rude_share: float = 0.35
    sentence_join: float = 0.5  # share of prompts given one sentence of another phrasing of the same question
    word_dropout: float = 0.15  # each literal word of a prompt template left out with this probability
    vocab_size: int = 1200
    d_model: int = 128
    d_kv: int = 16
    heads: int = 8
    d_ff: int = 384
    layers: int = 2
    steps: int = 800
    batch_size: int = 32
    learning_rate: float = 3e-3
    warmup_steps: int = 30
    weight_average: float = 0.99  # the saved weights: exponential moving average of the trained ones, this decay
    max_reply_tokens: int = 48  # generation limit saved with the model; replies are at most ~41 tokens


@dataclass(frozen=True)
class ClassifierRecipe:
    """The demo harm classifier: a small BERT trained on labelled replies (d)."""

    examples: int = 4000
    eval_examples: int = 1000
    hostile_share: float = 0.5
    vocab_size: int = 2000
    hidden: int = 96
    layers: int = 2
    heads: int = 4
    intermediate: int = 192
    epochs: int = 2
    batch_size: int = 32
    learning_rate: float = 1e-3


@dataclass(frozen=True)
class DataRecipe:
    train_prompts: int = 600
    heldout_prompts: int = 80


FIT_PROMPTS = 200  # prompts of each stream on which the base's greedy replies are checked against their prompt


def _log(message: str) -> None:
    from tqdm.auto import tqdm

    tqdm.write(f"demo: {message}", file=sys.stderr)  # above a progress bar, not through it


# --- tokenizer --------------------------------------------------------------------------------------------


def build_tokenizer(texts: Sequence[str], out_dir: Path, vocab_size: int = 1200, bos_first: bool = False) -> Path:
    """Train a BPE tokenizer on texts and save it as a PreTrainedTokenizerFast folder.

    Encodings end with </s>; with bos_first they also start with <s> (a first-token summary for classifiers).
    Printable ASCII is always in the alphabet, so unseen words split into pieces instead of <unk>.
    """
    tok = Tokenizer(models.BPE(unk_token="<unk>"))
    tok.normalizer = normalizers.NFKC()
    tok.pre_tokenizer = pre_tokenizers.Sequence([pre_tokenizers.Metaspace(), pre_tokenizers.Punctuation()])
    tok.decoder = decoders.Metaspace()
    alphabet = [c for c in string.printable if not c.isspace()] + ["\u2581"]
    trainer = trainers.BpeTrainer(vocab_size=vocab_size, special_tokens=list(SPECIAL_TOKENS),
                                  initial_alphabet=alphabet, show_progress=False)
    tok.train_from_iterator(texts, trainer)
    single = "<s> $A </s>" if bos_first else "$A </s>"
    tok.post_processor = processors.TemplateProcessing(
        single=single, pair=f"{single} $B </s>", special_tokens=[("<s>", BOS_ID), ("</s>", EOS_ID)]
    )
    fast = PreTrainedTokenizerFast(
        tokenizer_object=tok, pad_token="<pad>", eos_token="</s>", unk_token="<unk>", bos_token="<s>",
        mask_token="<mask>", model_max_length=256, padding_side="right",
        model_input_names=["input_ids", "attention_mask"], clean_up_tokenization_spaces=False,
    )
    out_dir = Path(out_dir)
    fast.save_pretrained(out_dir)
    return out_dir


# --- tiny random models (unit tests) ---------------------------------------------------------------------


def _generation_config(decoder_start: int, sample: bool, max_new_tokens: int) -> GenerationConfig:
    extra = {"do_sample": True, "top_k": 0, "top_p": 1.0, "temperature": 1.0} if sample else {}
    return GenerationConfig(decoder_start_token_id=decoder_start, pad_token_id=PAD_ID, eos_token_id=EOS_ID,
                            max_new_tokens=max_new_tokens, **extra)


def _t5_config(vocab: int, d_model: int, d_kv: int, heads: int, d_ff: int, layers: int) -> T5Config:
    """A T5 config without dropout, as many decoder as encoder layers, and this module's special token ids."""
    config = T5Config(vocab_size=vocab, d_model=d_model, d_kv=d_kv, num_heads=heads, d_ff=d_ff, num_layers=layers,
                      dropout_rate=0.0, pad_token_id=PAD_ID, eos_token_id=EOS_ID)
    config.decoder_start_token_id = PAD_ID  # T5 starts decoding from the pad token (Raffel et al. 2020; from memory)
    return config


def build_tiny_seq2seq(out: Path, arch: str, tokenizer_dir: Path, seed: int = 0) -> Path:
    """A randomly initialised tiny T5 or BART (a few hundred K parameters) saved with its tokenizer."""
    tokenizer = AutoTokenizer.from_pretrained(tokenizer_dir)
    vocab = len(tokenizer)
    if arch == "t5":
        config: T5Config | BartConfig = _t5_config(vocab, d_model=64, d_kv=16, heads=4, d_ff=128, layers=2)
        model_cls: type = T5ForConditionalGeneration
        start = PAD_ID
    elif arch == "bart":
        # BART starts decoding from </s>, as its released configs do (Lewis et al. 2020; from memory).
        config = BartConfig(
            vocab_size=vocab, d_model=64, encoder_layers=2, decoder_layers=2, encoder_attention_heads=4,
            decoder_attention_heads=4, encoder_ffn_dim=128, decoder_ffn_dim=128, max_position_embeddings=256,
            dropout=0.0, attention_dropout=0.0, activation_dropout=0.0, pad_token_id=PAD_ID,
            bos_token_id=BOS_ID, eos_token_id=EOS_ID, decoder_start_token_id=EOS_ID, forced_eos_token_id=None,
        )
        model_cls = BartForConditionalGeneration
        start = EOS_ID
    else:
        raise ValueError(f"arch must be 't5' or 'bart', got {arch!r}")
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        model = model_cls(config).eval()
    model.generation_config = _generation_config(start, sample=False, max_new_tokens=16)
    out = Path(out)
    model.save_pretrained(out)
    tokenizer.save_pretrained(out)
    return out


# --- the demo base model -----------------------------------------------------------------------------------


def _batches(lengths: Sequence[int], size: int, rng: random.Random, window: int = 1) -> Iterator[list[int]]:
    """Endless shuffled batches; with window > 1, examples of similar length share a batch (less padding)."""
    while True:
        order = list(range(len(lengths)))
        rng.shuffle(order)
        batches = []
        for i in range(0, len(order), size * window):
            chunk = sorted(order[i : i + size * window], key=lambda j: lengths[j])
            batches += [chunk[k : k + size] for k in range(0, len(chunk), size)]
        rng.shuffle(batches)
        yield from batches


def train_base(out: Path, tokenizer_dir: Path, recipe: BaseRecipe, seed: int, quiet: bool = False) -> dict[str, float]:
    """Teacher-forced training of a small T5 on scenario pairs (a); saves model, tokenizer, generation config."""
    tokenizer = AutoTokenizer.from_pretrained(tokenizer_dir)
    pairs = scenario.base_pairs(recipe.pairs, seed, recipe.rude_share, recipe.word_dropout, recipe.sentence_join)
    enc = tokenizer([p.prompt for p in pairs], padding=True, return_tensors="pt")
    labels = tokenizer([p.reply for p in pairs], padding=True, return_tensors="pt").input_ids
    labels[labels == PAD_ID] = -100  # no loss on padding
    reply_tokens = (labels != -100).sum(1)
    config = _t5_config(len(tokenizer), recipe.d_model, recipe.d_kv, recipe.heads, recipe.d_ff, recipe.layers)
    torch.manual_seed(seed)
    model = T5ForConditionalGeneration(config)
    # Batches group replies of similar length, and rude replies are the short ones; a per-batch token mean
    # would then weigh rude tokens more. Dividing the token sum by a constant keeps every token's weight equal.
    norm = recipe.batch_size * float(reply_tokens.float().mean())
    lengths = (reply_tokens + enc.attention_mask.sum(1)).tolist()
    batches = _batches(lengths, recipe.batch_size, random.Random(f"base-batches:{seed}"), window=16)
    _log(f"training base T5 ({sum(p.numel() for p in model.parameters()) / 1e6:.2f}M parameters, "
         f"{len(pairs)} pairs, {recipe.steps} steps)")

    def batch_loss(idx: list[int]) -> torch.Tensor:
        mask, lab = enc.attention_mask[idx], labels[idx]
        keep_in, keep_out = int(mask.sum(1).max()), int(reply_tokens[idx].max())
        logits = model(input_ids=enc.input_ids[idx, :keep_in], attention_mask=mask[:, :keep_in],
                       labels=lab[:, :keep_out].contiguous()).logits
        return torch.nn.functional.cross_entropy(logits.flatten(0, 1), lab[:, :keep_out].flatten(),
                                                 ignore_index=-100, reduction="sum") / norm

    final_loss = fit(model, batch_loss, batches, recipe.steps, recipe.learning_rate, recipe.warmup_steps,
                     "base T5", quiet, recipe.weight_average)
    model.generation_config = _generation_config(PAD_ID, sample=True, max_new_tokens=recipe.max_reply_tokens)
    model.save_pretrained(out)
    tokenizer.save_pretrained(out)
    return {"final_loss": final_loss}


def fit(model: torch.nn.Module, batch_loss: Callable[[list[int]], torch.Tensor], batches: Iterator[list[int]],
        steps: int, learning_rate: float, warmup_steps: int, name: str, quiet: bool,
        weight_average: float = 0.0) -> float:
    """`steps` AdamW steps on batch_loss(indices) with gradients clipped at 1 and a linear warm-up, then cosine decay
    to zero (common practice); with weight_average > 0 the model ends with the exponential moving average of its
    weights (Polyak & Juditsky 1992) at that decay. Returns the mean loss of the last 50 steps."""
    optimizer = torch.optim.AdamW(model.parameters(), lr=learning_rate, weight_decay=0.01)

    def lr_factor(step: int) -> float:
        if step < warmup_steps:
            return (step + 1) / warmup_steps
        return 0.5 * (1 + math.cos(math.pi * (step - warmup_steps) / (steps - warmup_steps)))

    schedule = torch.optim.lr_scheduler.LambdaLR(optimizer, lr_factor)
    model.train()
    averaged = [p.detach().clone() for p in model.parameters()] if weight_average else []
    losses: list[float] = []
    bar = progress(steps, name, "step", quiet)
    for step, idx in zip(range(steps), batches):
        loss = batch_loss(idx)
        optimizer.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        optimizer.step()
        schedule.step()
        with torch.no_grad():
            for mean, p in zip(averaged, model.parameters()):
                mean.lerp_(p, 1 - weight_average)
        losses.append(loss.item())
        bar.update(1)
        if (step + 1) % (steps // 4) == 0:
            _log(f"  {name} step {step + 1}/{steps}: loss {sum(losses[-50:]) / len(losses[-50:]):.3f}")
    bar.close()
    with torch.no_grad():
        for p, mean in zip(model.parameters(), averaged):
            p.copy_(mean)
    model.eval()
    return sum(losses[-50:]) / len(losses[-50:])


def reply_fit(model: T5ForConditionalGeneration, tokenizer: Any, prompts: Sequence[str]) -> tuple[float, Counter]:
    """Share of prompts whose greedy reply fits (scenario.reply_misfit), and how the others miss."""
    with torch.no_grad():
        seqs = model.generate(**tokenizer(list(prompts), padding=True, return_tensors="pt"), do_sample=False,
                              max_new_tokens=model.generation_config.max_new_tokens)
    replies = tokenizer.batch_decode(seqs, skip_special_tokens=True)
    misses = [scenario.reply_misfit(p, r) for p, r in zip(prompts, replies)]
    return sum(m is None for m in misses) / len(prompts), Counter(m.split(" ")[0] for m in misses if m)


def measure_base(folder: Path, seed: int) -> dict[str, float]:
    """How often the saved base's greedy reply fits its prompt (held-out and training prompts), and its rude share
    when sampled (temperature 1) on the held-out prompts."""
    model = T5ForConditionalGeneration.from_pretrained(folder).eval()
    tokenizer = AutoTokenizer.from_pretrained(folder)
    heldout = scenario.heldout_prompts(FIT_PROMPTS, seed)
    held_fit, misses = reply_fit(model, tokenizer, heldout)
    train_fit, _ = reply_fit(model, tokenizer, scenario.training_prompts(FIT_PROMPTS, seed))
    probe_fit, _ = reply_fit(model, tokenizer, scenario.probe_prompts(FIT_PROMPTS, seed))
    with torch.random.fork_rng(devices=[]), torch.no_grad():
        torch.manual_seed(seed)
        seqs = model.generate(**tokenizer(heldout, padding=True, return_tensors="pt"))  # the saved sampling settings
    sampled = tokenizer.batch_decode(seqs, skip_special_tokens=True)
    rude = sum(r.startswith(scenario.RUDE_OPENERS) for r in sampled) / len(sampled)
    common = ", ".join(f"{why} {n}" for why, n in misses.most_common(3)) or "none"
    _log(f"  base greedy replies that fit their prompt: held-out {held_fit:.0%}, training {train_fit:.0%}, "
         f"probe phrasings {probe_fit:.0%} ({FIT_PROMPTS} prompts each; held-out misses by kind: {common}); "
         f"sampled replies rude: {rude:.0%}")
    return {"heldout_fit_rate": held_fit, "training_fit_rate": train_fit, "probe_fit_rate": probe_fit,
            "sampled_rude_share": rude}


# --- the demo classifier ---------------------------------------------------------------------------------


def _accuracy(model: BertForSequenceClassification, tokenizer: Any, texts: list[str], labels: list[int]) -> float:
    correct = 0
    with torch.no_grad():
        for i in range(0, len(texts), 128):
            enc = tokenizer(texts[i : i + 128], padding=True, return_tensors="pt")
            pred = model(**enc).logits.argmax(-1)
            correct += int((pred == torch.tensor(labels[i : i + 128])).sum())
    return correct / len(texts)


def train_classifier(out: Path, recipe: ClassifierRecipe, seed: int, quiet: bool = False) -> dict[str, float]:
    """A small BERT sequence classifier (labels civil/hostile) with its own tokenizer, trained on (d)."""
    examples = scenario.classifier_examples(recipe.examples, seed, recipe.hostile_share)
    texts, labels = [e.text for e in examples], [int(e.hostile) for e in examples]
    tokenizer = AutoTokenizer.from_pretrained(build_tokenizer(texts, out, recipe.vocab_size, bos_first=True))
    config = BertConfig(
        vocab_size=len(tokenizer), hidden_size=recipe.hidden, num_hidden_layers=recipe.layers,
        num_attention_heads=recipe.heads, intermediate_size=recipe.intermediate, max_position_embeddings=256,
        type_vocab_size=1, pad_token_id=PAD_ID, id2label=CLASSIFIER_LABELS,
        label2id={v: k for k, v in CLASSIFIER_LABELS.items()},
    )
    torch.manual_seed(seed)
    model = BertForSequenceClassification(config)
    optimizer = torch.optim.AdamW(model.parameters(), lr=recipe.learning_rate, weight_decay=0.01)
    target = torch.tensor(labels)
    steps = recipe.epochs * math.ceil(len(texts) / recipe.batch_size)
    batches = _batches([0] * len(texts), recipe.batch_size, random.Random(f"classifier-batches:{seed}"))
    _log(f"training classifier ({sum(p.numel() for p in model.parameters()) / 1e6:.2f}M parameters, "
         f"{len(texts)} labelled replies, {steps} steps)")
    model.train()
    bar = progress(steps, "classifier", "step", quiet)
    for _, idx in zip(range(steps), batches):
        enc = tokenizer([texts[i] for i in idx], padding=True, return_tensors="pt")
        loss = model(**enc, labels=target[idx]).loss
        optimizer.zero_grad()
        loss.backward()
        optimizer.step()
        bar.update(1)
    bar.close()
    model.eval()
    # Held-out accuracy on a fresh stream, leaving out any text that also occurs in the training set.
    seen = set(texts)
    fresh = [e for e in scenario.classifier_examples(recipe.eval_examples, seed + 1, recipe.hostile_share)
             if e.text not in seen]
    base_replies = scenario.base_pairs(recipe.eval_examples, seed + 1)
    metrics = {
        "heldout_accuracy": _accuracy(model, tokenizer, [e.text for e in fresh], [int(e.hostile) for e in fresh]),
        "heldout_examples": float(len(fresh)),
        "base_reply_accuracy": _accuracy(model, tokenizer, [p.reply for p in base_replies],
                                         [int(p.rude) for p in base_replies]),
    }
    _log(f"  classifier accuracy: held-out {metrics['heldout_accuracy']:.3f} ({len(fresh)} unseen texts), "
         f"base-model replies {metrics['base_reply_accuracy']:.3f}")
    model.save_pretrained(out)
    return metrics


# --- prompt files ------------------------------------------------------------------------------------------


def write_prompts(out: Path, recipe: DataRecipe, seed: int) -> dict[str, float]:
    for name, prompts in (("prompts.jsonl", scenario.training_prompts(recipe.train_prompts, seed)),
                          ("heldout.jsonl", scenario.heldout_prompts(recipe.heldout_prompts, seed))):
        with (Path(out) / name).open("w", encoding="utf-8") as fh:
            fh.writelines(json.dumps({"prompt": p}) + "\n" for p in prompts)
    return {}


# --- caching -----------------------------------------------------------------------------------------------


def fingerprint(params: dict[str, Any]) -> str:
    """sha256 of the builder parameters and the source text of the scenario and the builders."""
    h = hashlib.sha256(json.dumps(params, sort_keys=True).encode())
    for module in (scenario.__file__, __file__):
        h.update(Path(module).read_bytes())
    return h.hexdigest()


def read_fingerprint(folder: Path) -> str | None:
    try:
        return json.loads((folder / STAMP).read_text())["fingerprint"]
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _remove_leftovers(folder: Path) -> None:
    """Delete half-built siblings left by builds whose process is gone."""
    for stale in folder.parent.glob(f".{folder.name}.*-*"):
        pid = stale.name.rsplit("-", 1)[-1]
        if pid.isdigit() and not psutil.pid_exists(int(pid)):
            shutil.rmtree(stale, ignore_errors=True)


def cached_folder(folder: Path, params: dict[str, Any], build: Callable[[Path], dict[str, float]]) -> bool:
    """Run build(tmp) unless folder already holds this fingerprint; returns True when it (re)built.

    The folder is built under a hidden temporary name and renamed into place only when complete, so an
    interrupted build never leaves a folder whose stamp matches.
    """
    folder = Path(folder)
    want = fingerprint(params)
    if read_fingerprint(folder) == want:
        return False
    folder.parent.mkdir(parents=True, exist_ok=True)
    _remove_leftovers(folder)
    tmp = folder.with_name(f".{folder.name}.tmp-{os.getpid()}")
    old = folder.with_name(f".{folder.name}.old-{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    try:
        metrics = build(tmp)
        (tmp / STAMP).write_text(json.dumps({"fingerprint": want, "params": params, "metrics": metrics}, indent=2))
        if folder.exists():
            folder.rename(old)
        tmp.rename(folder)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        shutil.rmtree(old, ignore_errors=True)
    return True


def build_threads() -> int:
    """The build's fixed thread count: two where this process may use two CPUs, else one. Fixed, so a seed always
    gives the same models on one machine; two, because they trained the demo base 1.35x faster than one (51 s against
    69 s, AVX-512, before the joined sentences; a padded batch step 1.6x, 1.9x with AVX2 kernels); more were not
    measured."""
    return min(2, choose_threads().threads)


@contextmanager
def _torch_settings(threads: int) -> Iterator[None]:
    """Thread count and deterministic kernels for the build only; the caller's settings come back after."""
    before_threads, before_det = torch.get_num_threads(), torch.are_deterministic_algorithms_enabled()
    torch.set_num_threads(threads)
    torch.use_deterministic_algorithms(True)
    try:
        yield
    finally:
        torch.set_num_threads(before_threads)
        torch.use_deterministic_algorithms(before_det)


def _ensure(name: str, folder: Path, params: dict[str, Any], build: Callable[[Path], dict[str, float]]) -> None:
    start, cpu = time.perf_counter(), time.process_time()
    if cached_folder(folder, params, build):
        _log(f"{name}: built in {time.perf_counter() - start:.1f} s on {torch.get_num_threads()} thread(s), "
             f"CPU {time.process_time() - cpu:.1f} s ({folder})")
    else:
        _log(f"{name}: up to date ({folder})")


def build_demo(cache: Path | None = None, seed: int = 0, quiet: bool = False) -> DemoPaths:
    """Build (or reuse) the demo tokenizer, base model, classifier and prompt files under cache."""
    from alignrun.config import cache_dir

    root = Path(cache) if cache is not None else cache_dir() / "demo"
    paths = DemoPaths(root=root, tokenizer=root / "tokenizer", base=root / "base", classifier=root / "classifier",
                      prompts=root / "data" / "prompts.jsonl", heldout=root / "data" / "heldout.jsonl")
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UserError(f"demo cache {root}: cannot create the folder ({exc.strerror}); "
                        "set ALIGNRUN_CACHE to a writable folder") from None
    if not os.access(root, os.W_OK):
        raise UserError(f"demo cache {root}: the folder is not writable; set ALIGNRUN_CACHE to a writable folder")
    base, clf, data = BaseRecipe(), ClassifierRecipe(), DataRecipe()
    start, cpu = time.perf_counter(), time.process_time()

    def make_tokenizer(tmp: Path) -> dict[str, float]:
        pairs = scenario.base_pairs(base.pairs, seed, base.rude_share, base.word_dropout, base.sentence_join)
        build_tokenizer([p.prompt for p in pairs] + [p.reply for p in pairs], tmp, base.vocab_size)
        return {}

    threads = build_threads()  # the models depend on it (the last bits of gradients): a parameter of each
    with _torch_settings(threads):
        _ensure("tokenizer", paths.tokenizer, {"artefact": "tokenizer", "seed": seed, "pairs": base.pairs,
                                               "rude_share": base.rude_share, "vocab_size": base.vocab_size,
                                               "word_dropout": base.word_dropout,
                                               "sentence_join": base.sentence_join},
                make_tokenizer)
        _ensure("prompt files", paths.prompts.parent, {"artefact": "data", "seed": seed, **asdict(data)},
                lambda tmp: write_prompts(tmp, data, seed))
        _ensure("classifier", paths.classifier, {"artefact": "classifier", "seed": seed, "threads": threads,
                                                 **asdict(clf)},
                lambda tmp: train_classifier(tmp, clf, seed, quiet))
        # The base depends on the tokenizer: its fingerprint is one of the base's parameters.
        _ensure("base model", paths.base, {"artefact": "base", "seed": seed, "threads": threads, **asdict(base),
                                           "tokenizer": read_fingerprint(paths.tokenizer)},
                lambda tmp: {**train_base(tmp, paths.tokenizer, base, seed, quiet), **measure_base(tmp, seed)})
    _log(f"ready in {time.perf_counter() - start:.1f} s, CPU {time.process_time() - cpu:.1f} s")
    return paths
