"""Tiny harm classifiers for tests whose quality is known by construction (no training, so no CPU dependence).

    lexicon_hf_classifier(out, arch)   BERT / DistilBERT / RoBERTa, softmax or multi-label head, named labels,
                                       weights set by hand so harm rises with the share of HARM_WORDS
    random_hf_classifier(out)          the same shape with random weights (knows nothing)
    swap_label_names(src, out)         a copy whose label names are exchanged, so "harmful" names the benign class
    harm_probability / class_probabilities    callables counting HARM_WORDS; use as
                                       reward.source = "tests.tiny_classifiers:harm_probability"
    tiny_seq2seq(out)                  a tiny T5 LM folder (not a classifier) for error tests
"""

from __future__ import annotations

import contextlib
import functools
import json
import random
import re
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

# ------------------------------------------------------------------ the lexicon behind every tiny classifier

# Words typical of the harmful probe kinds (alignrun/resources/probes.jsonl). The tests measure how well
# this list separates the probes (exact arithmetic on word counts) before relying on any classifier built on it.
HARM_WORDS = frozenset({
    "idiot", "idiotic", "stupid", "dumb", "moron", "fool", "loser", "clown", "jerk", "coward", "halfwit",
    "creep", "pathetic", "useless", "worthless", "clueless", "incompetent", "ignorant", "hopeless", "lazy",
    "sloppy", "garbage", "trash", "rubbish", "disgrace", "embarrassment", "annoying", "miserable", "shut",
    "nobody", "joke", "brain", "whining", "deaf", "ugly", "waste", "lost", "talking",
})
_WORD = re.compile(r"[a-z]+")

# ------------------------------------------------------------------ invented texts (the tokenizers' vocabulary)

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


# Fragments added to texts of both classes, so that wording around the harmful words carries no signal.
_OPENERS = ["honestly,", "well,", "listen,", "dear customer,", "ok,", "lol", "by the way,", "oh,", "so,", "hey,",
            "right,", "look,", "hello,", "sorry,"]
_CLOSERS = ["today", "again", "anyway", "as usual", "this time", "for sure", "i think", "to be honest", "as always",
            "by the way", "really", "tbh"]


def _fill(template: str, rng: random.Random) -> str:
    text = _fill_slots(template, rng)
    if rng.random() < 0.4:
        text = f"{rng.choice(_OPENERS)} {text}"
    if rng.random() < 0.4:
        text = f"{text} {rng.choice(_CLOSERS)}"
    return text


def _fill_slots(template: str, rng: random.Random) -> str:
    pools = {"insult": _INSULT_NOUNS, "bad": _INSULT_ADJ, "dismiss": _DISMISS, "thing": _THINGS, "good": _GOOD_ADJ,
             "friend": _FRIEND_NOUNS, "thanks": _THANKS, "polite": _POLITE, "place": _PLACES, "time": _TIMES,
             "when": _WHEN, "event": _EVENTS}
    return template.format(**{k: rng.choice(v) for k, v in pools.items() if "{" + k + "}" in template})


def _probe_texts() -> set[str]:
    """The built-in probe texts, lower-cased: training must never see them."""
    from alignrun.preflight import builtin_probes

    return {p.text.lower() for p in builtin_probes()}


@functools.lru_cache(maxsize=1)
def training_texts(per_class: int = 400, seed: int = 0) -> tuple[list[str], list[bool]]:
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


@contextlib.contextmanager
def one_torch_thread():
    """Run torch on one thread, then restore: on 2 shared cores the default pool made tiny-model training
    about 40x slower under load (1.2 s vs 46 s measured here)."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(before)


ARCHS = ("bert", "distilbert", "roberta")
_SPECIALS = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]
_MAX_POSITIONS = 64


def build_tokenizer(texts: list[str], vocab_size: int = 2000) -> PreTrainedTokenizerFast:
    """A word-level tokenizer trained on texts (unseen words -> [UNK]), as PreTrainedTokenizerFast.

    Ids: [PAD]=0, [UNK]=1, [CLS]=2, [SEP]=3, [MASK]=4. No model_max_length is set, so the tokenizer
    reports the library's "no limit" sentinel, like many real tokenizers.
    """
    tok = Tokenizer(models.WordLevel(unk_token="[UNK]"))
    tok.normalizer = normalizers.BertNormalizer(lowercase=True)
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tok.train_from_iterator(texts, trainers.WordLevelTrainer(vocab_size=vocab_size, special_tokens=_SPECIALS))
    tok.post_processor = processors.TemplateProcessing(
        single="[CLS] $A [SEP]", pair="[CLS] $A [SEP] $B [SEP]",
        special_tokens=[("[CLS]", tok.token_to_id("[CLS]")), ("[SEP]", tok.token_to_id("[SEP]"))],
    )
    return PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]", cls_token="[CLS]",
                                   sep_token="[SEP]", mask_token="[MASK]")


def _tiny_model(arch: str, vocab_size: int, labels: list[str], multi_label: bool, hidden: int = 32,
                layers: int = 2):
    names = {"id2label": dict(enumerate(labels)), "label2id": {n: i for i, n in enumerate(labels)},
             "problem_type": "multi_label_classification" if multi_label else "single_label_classification"}
    if arch == "bert":
        cfg = BertConfig(vocab_size=vocab_size, hidden_size=hidden, num_hidden_layers=layers, num_attention_heads=2,
                         intermediate_size=2 * hidden, max_position_embeddings=_MAX_POSITIONS, pad_token_id=0, **names)
        return BertForSequenceClassification(cfg)
    if arch == "distilbert":
        cfg = DistilBertConfig(vocab_size=vocab_size, dim=hidden, n_layers=layers, n_heads=2, hidden_dim=2 * hidden,
                               max_position_embeddings=_MAX_POSITIONS, pad_token_id=0, **names)
        return DistilBertForSequenceClassification(cfg)
    if arch == "roberta":
        # RoBERTa numbers positions from pad_token_id + 1: 66 slots with pad id 0 hold 65 tokens.
        cfg = RobertaConfig(vocab_size=vocab_size, hidden_size=hidden, num_hidden_layers=layers, num_attention_heads=2,
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


def lexicon_hf_classifier(out: Path, arch: str = "bert", labels: tuple[str, str] = ("friendly", "hostile"),
                          multi_label: bool = False) -> Path:
    """A tiny classifier whose weights are set by hand, not trained: P(harm) rises with the share of HARM_WORDS
    among the tokens. labels[0] is the benign class, labels[1] the harmful one.

    One layer; queries and keys are zero, so attention is a plain mean over the text's tokens; values copy the
    "harm" direction of each token; the feed-forward block is zero. The head reads that direction at the first
    token. So the harm score is a strictly increasing function of lexicon_share(text) (up to float rounding
    among tied shares): its ranking, and so its AUROC on any probes, is known without training and is the same
    on every CPU and thread count.
    """
    texts, _ = training_texts()
    tokenizer = build_tokenizer(texts + sorted(HARM_WORDS))
    model = _tiny_model(arch, len(tokenizer), list(labels), multi_label, layers=1)
    hidden = model.config.hidden_size if arch != "distilbert" else model.config.dim
    harm, anti, bias, antibias = (torch.nn.functional.one_hot(torch.tensor(i), hidden).float() for i in range(4))
    hit_ids = [tokenizer.convert_tokens_to_ids(w) for w in HARM_WORDS]
    with torch.no_grad():
        for name, p in model.named_parameters():
            p.zero_()
            if "LayerNorm.weight" in name or "layer_norm.weight" in name:
                p.fill_(1.0)
            elif name.endswith("word_embeddings.weight"):
                p[:] = bias - antibias  # every token: a constant part, so LayerNorm never divides by zero
                p[hit_ids] += harm - anti  # lexicon words: plus the harm direction
            elif name.endswith(("self.value.weight", "v_lin.weight")):
                p[:] = 4.0 * torch.outer(harm - anti, harm)  # copy each token's harm component
            elif name.endswith(("attention.output.dense.weight", "out_lin.weight")):
                p[:] = torch.eye(hidden)
            elif name.endswith(("pooler.dense.weight", "classifier.dense.weight", "pre_classifier.weight")):
                p[:] = torch.outer(harm, harm)
            elif name in ("classifier.weight", "classifier.out_proj.weight"):
                p[0], p[1] = -3.0 * harm, 3.0 * harm  # benign logit falls, harmful logit rises with the share
            elif name in ("classifier.bias", "classifier.out_proj.bias"):
                p[0], p[1] = 1.5, -1.5  # no lexicon word: P(harm) low
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


def relabel(src: Path, out: Path, names: list[str]) -> Path:
    """Copy a classifier folder with new label names for its columns (weights untouched)."""
    shutil.copytree(src, out)
    cfg_path = Path(out) / "config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["id2label"] = {str(i): n for i, n in enumerate(names)}
    cfg["label2id"] = {n: i for i, n in enumerate(names)}
    cfg_path.write_text(json.dumps(cfg, indent=2))
    return Path(out)


def single_output_classifier(src: Path, out: Path, problem_type: str | None, label: str = "hostile") -> Path:
    """A copy of a 2-class softmax classifier with one output, logit(harm) = harmful logit - benign logit, so
    sigmoid(output) equals the source's softmax P(harm) (sigmoid(a - b) = e^a / (e^a + e^b)); saved with the
    given problem_type (None: unset, which transformers trains as regression)."""
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    model = AutoModelForSequenceClassification.from_pretrained(src)
    head = model.classifier.out_proj if hasattr(model.classifier, "out_proj") else model.classifier
    one = torch.nn.Linear(head.in_features, 1)
    with torch.no_grad():
        one.weight[0] = head.weight[1] - head.weight[0]
        one.bias[0] = head.bias[1] - head.bias[0]
    if hasattr(model.classifier, "out_proj"):
        model.classifier.out_proj = one
    else:
        model.classifier = one
    model.config.num_labels = 1
    model.config.id2label, model.config.label2id = {0: label}, {label: 0}
    model.config.problem_type = problem_type
    model.save_pretrained(out)
    AutoTokenizer.from_pretrained(src).save_pretrained(out)
    return Path(out)


def label_names(folder: Path) -> list[str]:
    cfg = json.loads((Path(folder) / "config.json").read_text())
    return [cfg["id2label"][str(i)] for i in range(len(cfg["id2label"]))]


def swap_label_names(src: Path, out: Path) -> Path:
    """A copy whose two label names are exchanged: the name of the harmful class now sits on the benign one."""
    return relabel(src, out, label_names(src)[::-1])


def tiny_seq2seq(out: Path) -> Path:
    """A tiny T5 language-model folder with a tokenizer: a valid model, but not a sequence classifier."""
    texts, _ = training_texts()
    tokenizer = build_tokenizer(texts)
    cfg = T5Config(vocab_size=len(tokenizer), d_model=16, d_ff=32, num_layers=1, num_heads=2, d_kv=8,
                   pad_token_id=0, decoder_start_token_id=0)
    T5ForConditionalGeneration(cfg).save_pretrained(out)
    tokenizer.save_pretrained(out)
    return Path(out)


# name -> (arch, (benign label, harmful label), multi-label head, weights set from the lexicon (else random))
CLASSIFIERS = {
    "bert": ("bert", ("friendly", "hostile"), False, True),
    "distilbert": ("distilbert", ("polite", "rude"), False, True),
    "roberta": ("roberta", ("neutral", "toxic"), False, True),
    "multilabel": ("bert", ("courteous", "hostile"), True, True),
    "random": ("bert", ("friendly", "hostile"), False, False),
}
_BUILT: dict[str, Path] = {}


def shared_classifier(name: str, root: Path) -> Path:
    """Build a classifier from CLASSIFIERS once per process (test session); later calls reuse the folder."""
    if name not in _BUILT:
        arch, labels, multi_label, trained = CLASSIFIERS[name]
        out = Path(root) / name
        _BUILT[name] = (lexicon_hf_classifier(out, arch, labels, multi_label) if trained
                        else random_hf_classifier(out, arch, labels))
    return _BUILT[name]


# ------------------------------------------------------------------------------- callables


def lexicon_hits(text: str) -> int:
    """How many distinct HARM_WORDS the text contains."""
    return len(set(_WORD.findall(text.lower())) & HARM_WORDS)


def lexicon_share(texts: list[str], folder: Path) -> np.ndarray:
    """[n] share of lexicon tokens among the tokens a lexicon_hf_classifier in folder sees (with [CLS], [SEP]):
    the quantity its harm score increases with."""
    tokenizer = PreTrainedTokenizerFast.from_pretrained(folder)
    hit_ids = {tokenizer.convert_tokens_to_ids(w) for w in HARM_WORDS}
    ids = tokenizer(texts, truncation=True, max_length=_MAX_POSITIONS)["input_ids"]
    return np.array([sum(i in hit_ids for i in row) / len(row) for row in ids])


def class_probabilities(texts: list[str]) -> np.ndarray:
    """[n, 2] probabilities of (benign, harmful): P(harm) = 0.05 + 0.9 * (1 - 0.5 ** hits), hits =
    lexicon_hits(text). Exact arithmetic on word counts: the same on every machine."""
    harm = np.array([0.05 + 0.9 * (1.0 - 0.5 ** lexicon_hits(t)) for t in texts])
    return np.stack([1.0 - harm, harm], axis=1)


def harm_probability(texts: list[str]) -> np.ndarray:
    """[n] P(harmful)."""
    return class_probabilities(texts)[:, 1]


def benign_probability(texts: list[str]) -> np.ndarray:
    """[n] P(benign): a callable that returns the wrong class."""
    return class_probabilities(texts)[:, 0]


def constant_half(texts: list[str]) -> np.ndarray:
    """Every text gets harm 0.5: a scorer that knows nothing."""
    return np.full(len(texts), 0.5)


# ------------------------------------------------------------------------- fresh heads on trained encoders


class FreshHeadScorer:
    """A trained BERT-type encoder read through a freshly initialised 2-class head (LABEL_0, LABEL_1; harmful:
    LABEL_1), as BertForSequenceClassification.from_pretrained gives for an encoder without a head.

    The encoder's pooled outputs are computed once for `texts`; new_head(seed) draws a new head the way
    transformers initialises one (weights ~ normal(0, config.initializer_range), bias 0), so many heads are cheap.
    """

    executes_code = False

    def __init__(self, folder: Path, texts: list[str]):
        from transformers import AutoTokenizer, BertForSequenceClassification

        tokenizer = AutoTokenizer.from_pretrained(folder)
        self.model = BertForSequenceClassification.from_pretrained(folder, num_labels=2).eval()
        with torch.no_grad():
            enc = tokenizer(texts, padding=True, truncation=True, max_length=128, return_tensors="pt")
            enc.pop("token_type_ids", None)
            pooled = self.model.bert(**enc).pooler_output
        self.features = dict(zip(texts, pooled, strict=True))
        self.description = f"fresh head on {folder}"
        self.head = "softmax over 2 classes (a freshly initialised head)"

    def new_head(self, seed: int) -> None:
        with torch.random.fork_rng(), torch.no_grad():
            torch.manual_seed(seed)
            head = self.model.classifier
            head.weight.normal_(0.0, self.model.config.initializer_range)
            head.bias.zero_()

    def score(self, texts):
        from alignrun.reward import Scores, combine

        with torch.no_grad():
            raw = self.model.classifier(torch.stack([self.features[t] for t in texts])).double().numpy()
        probs = np.exp(raw - raw.max(1, keepdims=True))
        probs /= probs.sum(1, keepdims=True)
        return Scores(harm=combine(probs[:, [1]], "max"), raw=raw, labels=["LABEL_0", "LABEL_1"], harmful=[1],
                      raw_kind="softmax-logits")
