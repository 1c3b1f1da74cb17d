"""Tiny harm classifiers for tests, trained in seconds on invented texts (none of them a probe text).

    train_hf_classifier(out, arch)     BERT / DistilBERT / RoBERTa, softmax or multi-label head, named labels
    random_hf_classifier(out)          the same shape with random weights (knows nothing)
    swap_label_names(src, out)         a copy whose label names are exchanged, so "harmful" names the benign class
    harm_probability / class_probabilities    module:function callables backed by a char n-gram model
    tiny_seq2seq(out)                  a tiny T5 LM folder (not a classifier) for error tests
"""

from __future__ import annotations

import functools
import json
import random
import shutil
from pathlib import Path

import numpy as np
import torch
from tokenizers import Tokenizer, models, normalizers, pre_tokenizers, processors, trainers
from transformers import (
    BertConfig,
    BertForSequenceClassification,
    DistilBertConfig,
    DistilBertForSequenceClassification,
    PreTrainedTokenizerFast,
    RobertaConfig,
    RobertaForSequenceClassification,
    T5Config,
    T5ForConditionalGeneration,
)

# ------------------------------------------------------------------ invented training texts

_INSULT_NOUNS = ["idiot", "moron", "fool", "loser", "clown", "jerk", "coward", "halfwit", "creep", "nitwit",
                 "dimwit", "buffoon", "joke", "disgrace", "failure", "embarrassment", "pest", "slob"]
_INSULT_ADJ = ["stupid", "dumb", "pathetic", "useless", "worthless", "clueless", "lazy", "ignorant", "hopeless",
               "incompetent", "idiotic", "annoying", "sloppy", "miserable", "brainless", "ugly", "garbage", "trashy",
               "spineless", "disgusting", "rubbish", "awful"]
_DISMISS = ["nobody cares", "shut up", "get lost", "go away", "stop talking", "nobody asked", "spare me",
            "quit whining", "leave me alone", "who cares"]
_GOOD_ADJ = ["great", "lovely", "helpful", "clear", "wonderful", "excellent", "kind", "nice", "thoughtful",
             "useful", "brilliant", "friendly", "solid", "neat", "good", "fine", "careful", "quick", "tidy"]
_FRIEND_NOUNS = ["friend", "colleague", "helper", "teammate", "neighbour", "host", "partner", "guide"]
_THANKS = ["thank you", "thanks a lot", "many thanks", "much appreciated", "cheers", "thanks so much",
           "we appreciate it", "congratulations"]
_POLITE = ["happy to help", "no problem", "sounds good", "see you soon", "take care", "have a nice day",
           "glad to hear it", "welcome aboard", "no worries", "enjoy your weekend", "let me know", "good morning"]
_THINGS = ["idea", "question", "plan", "work", "excuse", "draft", "answer", "comment", "message", "email",
           "design", "summary", "advice", "story", "code", "sketch"]
_PLACES = ["office", "shop", "gym", "clinic", "station", "cafe", "pool", "market"]
_TIMES = ["eight", "ten", "noon", "six", "seven"]
_WHEN = ["today", "tomorrow", "on monday", "next week", "this afternoon", "by friday"]
_EVENTS = ["meeting", "call", "lunch", "review", "workshop", "party", "delivery", "order", "parcel", "update"]

_HARMFUL_TEMPLATES = [
    "you are such a {insult}", "what a {bad} {thing}", "{dismiss}, you {bad} {insult}", "your {thing} is {bad}",
    "only a {insult} would send this {thing}", "{dismiss}, your {thing} is {bad}",
    "honestly you are the most {bad} person here", "stop sending {bad} {thing}s, you {insult}",
    "how can anyone be this {bad}", "{dismiss}. nobody wants your {bad} {thing}", "you {insult}, that {thing} was {bad}",
    "{dismiss}", "ugh, another {bad} {thing} from a {insult}", "are you always this {bad}?",
    "{dismiss}, nobody wants a {insult} like you here", "you are a {bad} {insult} and everyone knows it",
]
_BENIGN_TEMPLATES = [
    "{thanks} for your {good} {thing}", "your {thing} was {good}", "what a {good} {thing}",
    "{polite}, your {thing} is {good}", "you are such a {good} {friend}", "the {place} opens at {time}",
    "please send the {thing} {when}", "we moved the {event} to {when}", "your {thing} arrived {when}",
    "{thanks}, {polite}", "honestly you are the most {good} person here", "{polite}",
    "the {event} went well, {thanks}", "the {event} is scheduled for {when}", "your {event} will arrive {when}",
    "could you check the {thing} {when}?", "{polite}! the {place} is open until {time}",
]


def _fill(template: str, rng: random.Random) -> str:
    pools = {"insult": _INSULT_NOUNS, "bad": _INSULT_ADJ, "dismiss": _DISMISS, "thing": _THINGS, "good": _GOOD_ADJ,
             "friend": _FRIEND_NOUNS, "thanks": _THANKS, "polite": _POLITE, "place": _PLACES, "time": _TIMES,
             "when": _WHEN, "event": _EVENTS}
    return template.format(**{k: rng.choice(v) for k, v in pools.items() if "{" + k + "}" in template})


def _probe_texts() -> set[str]:
    """The built-in probe texts, lower-cased: training must never see them."""
    from alignrun.preflight import builtin_probes

    return {p.text.lower() for p in builtin_probes()}


@functools.lru_cache(maxsize=1)
def training_texts(per_class: int = 240, seed: int = 0) -> tuple[list[str], list[bool]]:
    """(texts, is_harmful), invented from templates, deduplicated, balanced."""
    rng = random.Random(seed)
    probes = _probe_texts()
    rows: dict[str, bool] = {}
    for harmful, templates in ((True, _HARMFUL_TEMPLATES), (False, _BENIGN_TEMPLATES)):
        made = 0
        for _ in range(per_class * 20):
            text = _fill(rng.choice(templates), rng)
            if text not in rows and text not in probes:
                rows[text] = harmful
                made += 1
            if made == per_class:
                break
    texts = list(rows)
    return texts, [rows[t] for t in texts]


# ----------------------------------------------------------------------------- HF classifiers

ARCHS = ("bert", "distilbert", "roberta")
_SPECIALS = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]
_MAX_POSITIONS = 64
LR = 3e-3


def build_tokenizer(texts: list[str], vocab_size: int = 600) -> PreTrainedTokenizerFast:
    """A WordPiece tokenizer trained on texts, wrapped as PreTrainedTokenizerFast (ids: [PAD]=0 ... [MASK]=4)."""
    tok = Tokenizer(models.WordPiece(unk_token="[UNK]"))
    tok.normalizer = normalizers.BertNormalizer(lowercase=True)
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tok.train_from_iterator(texts, trainers.WordPieceTrainer(vocab_size=vocab_size, special_tokens=_SPECIALS))
    tok.post_processor = processors.TemplateProcessing(
        single="[CLS] $A [SEP]", pair="[CLS] $A [SEP] $B [SEP]",
        special_tokens=[("[CLS]", tok.token_to_id("[CLS]")), ("[SEP]", tok.token_to_id("[SEP]"))],
    )
    return PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]", cls_token="[CLS]",
                                   sep_token="[SEP]", mask_token="[MASK]")


def _tiny_model(arch: str, vocab_size: int, labels: list[str], multi_label: bool, hidden: int = 32):
    names = {"id2label": dict(enumerate(labels)), "label2id": {n: i for i, n in enumerate(labels)},
             "problem_type": "multi_label_classification" if multi_label else "single_label_classification"}
    if arch == "bert":
        cfg = BertConfig(vocab_size=vocab_size, hidden_size=hidden, num_hidden_layers=2, num_attention_heads=2,
                         intermediate_size=2 * hidden, max_position_embeddings=_MAX_POSITIONS, pad_token_id=0, **names)
        return BertForSequenceClassification(cfg)
    if arch == "distilbert":
        cfg = DistilBertConfig(vocab_size=vocab_size, dim=hidden, n_layers=2, n_heads=2, hidden_dim=2 * hidden,
                               max_position_embeddings=_MAX_POSITIONS, pad_token_id=0, **names)
        return DistilBertForSequenceClassification(cfg)
    if arch == "roberta":
        # RoBERTa positions start at pad_token_id + 1, so it needs two more position slots.
        cfg = RobertaConfig(vocab_size=vocab_size, hidden_size=hidden, num_hidden_layers=2, num_attention_heads=2,
                            intermediate_size=2 * hidden, max_position_embeddings=_MAX_POSITIONS + 2, pad_token_id=0,
                            bos_token_id=2, eos_token_id=3, type_vocab_size=1, **names)
        return RobertaForSequenceClassification(cfg)
    raise ValueError(f"unknown arch {arch!r}; one of {ARCHS}")


def _save(model, tokenizer: PreTrainedTokenizerFast, out: Path, arch: str) -> Path:
    if arch == "distilbert":
        tokenizer.model_input_names = ["input_ids", "attention_mask"]
    model.save_pretrained(out)
    tokenizer.save_pretrained(out)
    return out


def train_hf_classifier(out: Path, arch: str = "bert", labels: tuple[str, str] = ("friendly", "hostile"),
                        multi_label: bool = False, seed: int = 0, epochs: int = 6) -> Path:
    """Train a tiny classifier: labels[0] is the benign class, labels[1] the harmful one.

    Softmax heads learn class ids 0/1; multi-label heads learn the targets [1 - harmful, harmful].
    """
    texts, harmful = training_texts()
    tokenizer = build_tokenizer(texts)
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        model = _tiny_model(arch, len(tokenizer), list(labels), multi_label)
        opt = torch.optim.AdamW(model.parameters(), lr=LR)
        y = torch.tensor(harmful, dtype=torch.long)
        model.train()
        for _ in range(epochs):
            for idx in torch.randperm(len(texts)).split(32):
                enc = tokenizer([texts[i] for i in idx], padding=True, truncation=True, max_length=_MAX_POSITIONS,
                                return_tensors="pt")
                enc.pop("token_type_ids", None)
                target = torch.nn.functional.one_hot(y[idx], 2).float() if multi_label else y[idx]
                loss = model(**enc, labels=target).loss
                opt.zero_grad()
                loss.backward()
                opt.step()
    return _save(model.eval(), tokenizer, Path(out), arch)


def random_hf_classifier(out: Path, arch: str = "bert", labels: tuple[str, str] = ("friendly", "hostile"),
                         seed: int = 0) -> Path:
    """The same shape, never trained: its scores carry no information about harm."""
    texts, _ = training_texts()
    tokenizer = build_tokenizer(texts)
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        model = _tiny_model(arch, len(tokenizer), list(labels), multi_label=False)
    return _save(model.eval(), tokenizer, Path(out), arch)


def swap_label_names(src: Path, out: Path) -> Path:
    """Copy a two-label classifier folder with its two label names exchanged (weights untouched)."""
    shutil.copytree(src, out)
    cfg_path = Path(out) / "config.json"
    cfg = json.loads(cfg_path.read_text())
    names = [cfg["id2label"][str(i)] for i in range(len(cfg["id2label"]))]
    swapped = names[::-1]
    cfg["id2label"] = {str(i): n for i, n in enumerate(swapped)}
    cfg["label2id"] = {n: i for i, n in enumerate(swapped)}
    cfg_path.write_text(json.dumps(cfg, indent=2))
    return Path(out)


def tiny_seq2seq(out: Path) -> Path:
    """A tiny T5 language-model folder with a tokenizer: a valid model, but not a sequence classifier."""
    texts, _ = training_texts()
    tokenizer = build_tokenizer(texts)
    cfg = T5Config(vocab_size=len(tokenizer), d_model=16, d_ff=32, num_layers=1, num_heads=2, d_kv=8,
                   pad_token_id=0, decoder_start_token_id=0)
    T5ForConditionalGeneration(cfg).save_pretrained(out)
    tokenizer.save_pretrained(out)
    return Path(out)


# ------------------------------------------------------------------------------- callables


@functools.lru_cache(maxsize=1)
def _char_ngram_model():
    from sklearn.feature_extraction.text import TfidfVectorizer
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline

    texts, harmful = training_texts()
    pipe = make_pipeline(TfidfVectorizer(analyzer="char_wb", ngram_range=(2, 4)), LogisticRegression(C=10.0))
    return pipe.fit(texts, np.array(harmful, dtype=int))


def class_probabilities(texts: list[str]) -> np.ndarray:
    """[n, 2] probabilities of (benign, harmful) from a char n-gram model trained on the invented texts."""
    return _char_ngram_model().predict_proba(texts)


def harm_probability(texts: list[str]) -> np.ndarray:
    """[n] P(harmful)."""
    return class_probabilities(texts)[:, 1]


def benign_probability(texts: list[str]) -> np.ndarray:
    """[n] P(benign): a callable that returns the wrong class."""
    return class_probabilities(texts)[:, 0]


def constant_half(texts: list[str]) -> np.ndarray:
    """Every text gets harm 0.5: a scorer that knows nothing."""
    return np.full(len(texts), 0.5)
