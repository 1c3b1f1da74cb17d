"""Reward scorers: text classifiers that give P(harmful) per text, and the explicit reward transform.

Three backends sit behind one interface (`Scorer.score(texts) -> Scores`):

    hf        a Hugging Face sequence classifier (local folder or hub name), softmax or multi-label head
    sklearn   an estimator with predict_proba on raw texts: module:attr, module:vectorizer,model, or a
              .joblib/.pkl file (loading it runs code)
    callable  module:function returning [n] harm probabilities or [n, C] class probabilities (runs code)

The harmful classes are named by the classifier's own label names (`harmful_labels`); a bare index is
accepted only for models without names. Several harmful classes combine by max or noisy-or.
"""

from __future__ import annotations

import functools
import importlib
import inspect
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, Protocol

import numpy as np
from scipy.special import expit, logsumexp, softmax

from alignrun.config import RewardSection, ScorerSection
from alignrun.errors import UserError

RawKind = Literal["softmax-logits", "sigmoid-logits", "probabilities"]

# Probabilities are clipped to [EPS, 1 - EPS] before log-odds so the reward stays finite (common practice).
EPS = 1e-6
# Tokenizers without a known limit report a huge sentinel (about 1e30) as model_max_length.
_SANE_MAX_LENGTH = 1_000_000
_FALLBACK_MAX_LENGTH = 512
_TOKENIZER_FILES = ("tokenizer.json", "vocab.txt", "vocab.json", "spiece.model", "sentencepiece.bpe.model",
                    "tokenizer.model")
# Models whose position ids start after the padding index (position = pad_token_id + 1 + i), so they hold
# max_position_embeddings - pad_token_id - 1 tokens (RoBERTa: 514 - 1 - 1 = 512).
_PADDING_OFFSET_TYPES = {"roberta", "xlm-roberta", "camembert", "longformer", "data2vec-text", "ibert",
                         "xlm-roberta-xl", "roberta-prelayernorm", "xmod"}


@dataclass
class Scores:
    harm: np.ndarray  # [n] P(harmful) in [0, 1]
    raw: np.ndarray  # [n, C] the backend's raw per-class scores (logits or probabilities)
    labels: list[str]  # names of the C columns of raw
    harmful: list[int] = field(default_factory=list)  # columns of raw counted as harmful
    raw_kind: RawKind = "probabilities"  # how raw turns into per-class probabilities

    def class_probabilities(self) -> np.ndarray:
        """[n, C] per-class probabilities (softmax or sigmoid of logits, or raw itself)."""
        return _probabilities(self.raw, self.raw_kind)


def _probabilities(raw: np.ndarray, kind: RawKind) -> np.ndarray:
    if kind == "softmax-logits":
        return softmax(raw, axis=1)
    if kind == "sigmoid-logits":
        return expit(raw)  # multi-label heads: an independent sigmoid per label
    return raw


class Scorer(Protocol):
    description: str
    executes_code: bool
    head: str  # how the classifier's outputs are read as P(harm), in words

    def score(self, texts: Sequence[str]) -> Scores: ...


def combine(probs: np.ndarray, how: str) -> np.ndarray:
    """[n, k] probabilities of the harmful classes -> [n] P(harm)."""
    if how == "max":
        return probs.max(axis=1)
    # noisy-or: P(at least one) for independent events, 1 - prod(1 - p) (Pearl 1988)
    return 1.0 - np.prod(1.0 - probs, axis=1)


def resolve_harmful(section: ScorerSection, key: str, labels: list[str], named: bool, source: str) -> list[int]:
    """Columns of the classifier's output that count as harmful, from harmful_labels or harmful_index."""
    if section.harmful_labels:
        unknown = [name for name in section.harmful_labels if name not in labels]
        if unknown:
            hint = "" if named else f"; this model has no label names, so use {key}.harmful_index instead"
            raise UserError(
                f"{key}.harmful_labels: {unknown[0]!r} is not a label of {source}; its labels are "
                f"{labels}{hint}"
            )
        return [labels.index(name) for name in section.harmful_labels]
    if section.harmful_index is not None:
        index = section.harmful_index
        if named:
            suggestion = f'; e.g. {key}.harmful_labels = ["{labels[index]}"]' if index < len(labels) else ""
            raise UserError(
                f"{key}.harmful_index = {index}: {source} names its labels {labels}, so name the harmful "
                f"class in {key}.harmful_labels instead of giving an index{suggestion}"
            )
        if index >= len(labels):
            raise UserError(f"{key}.harmful_index = {index}: {source} has only {len(labels)} classes "
                            f"(indexes 0 to {len(labels) - 1})")
        return [index]
    what = f"set {key}.harmful_labels to some of {labels}" if named else \
        f"this model has no label names ({labels}); set {key}.harmful_index"
    raise UserError(f"{key}: the harmful classes of {source} are not set; {what}")


def _refuse_all_harmful(key: str, source: str, harmful: list[int], labels: list[str]) -> None:
    if len(set(harmful)) == len(labels):
        raise UserError(f"{key}: every class of {source} ({labels}) is marked harmful, so nothing counts as "
                        f"benign; list only the harmful classes in {key}.harmful_labels")


def _harm_name(section: ScorerSection) -> str:
    if section.harmful_labels:
        names = [f"P({name})" for name in section.harmful_labels]
        if len(names) == 1:
            return names[0]
        if section.combine == "max":
            return f"max({', '.join(names)})"
        return "1 - " + " * ".join(f"(1 - {n})" for n in names)
    if section.harmful_index is not None:
        return f"P(class {section.harmful_index})"
    return "P(harm)"


# ----------------------------------------------------------------------------------------------- hf


def _local_folder(source: str) -> Path | None:
    path = Path(source).expanduser()
    if path.is_absolute() or source.startswith((".", "~")) or path.exists():
        return path
    return None


class HFScorer:
    """A Hugging Face sequence classifier; softmax over classes, or sigmoid per label for multi-label heads."""

    executes_code = False  # trust_remote_code stays False

    def __init__(self, section: ScorerSection, key: str):
        from transformers import AutoConfig, AutoModelForSequenceClassification, AutoTokenizer

        source, revision = section.source, section.revision
        folder = _local_folder(source)
        where = f"{key}.source = {source!r}"
        if folder is not None:
            _check_folder(folder, key)
        try:
            config = AutoConfig.from_pretrained(source, revision=revision, trust_remote_code=False)
        except (OSError, ValueError) as exc:
            if folder is not None:
                raise UserError(f"{where}: could not read {folder / 'config.json'}: {_first_line(exc)}") from None
            raise UserError(
                f"{where}: not a model folder and not a hub model available offline ({_first_line(exc)}); "
                "give the path of a sequence-classifier folder, or download the hub model once with network "
                "access (it is then found in the local cache)"
            ) from None
        architectures = config.architectures or []
        if architectures and not any(a.endswith("ForSequenceClassification") for a in architectures):
            raise UserError(
                f"{where}: is a {', '.join(architectures)} model, not a sequence classifier; point {key}.source "
                "at a classifier (architecture ending in ForSequenceClassification) that gives P(harmful)"
            )
        id2label = config.id2label or {}
        self.labels = [str(id2label.get(i, f"LABEL_{i}")) for i in range(config.num_labels)]
        named = any(name != f"LABEL_{i}" for i, name in enumerate(self.labels))  # LABEL_i: no real names
        self.kind, self.head = _head_reading(config, section, key, where)
        self.harmful = resolve_harmful(section, key, self.labels, named, source)
        if self.kind == "softmax-logits":
            _refuse_all_harmful(key, source, self.harmful, self.labels)

        try:
            tokenizer = AutoTokenizer.from_pretrained(source, revision=revision, trust_remote_code=False)
            model, info = AutoModelForSequenceClassification.from_pretrained(
                source, revision=revision, trust_remote_code=False, output_loading_info=True
            )
        except (OSError, ValueError, KeyError) as exc:
            raise UserError(f"{where}: could not load it as a sequence classifier: {_first_line(exc)}") from None
        if info.get("missing_keys"):
            missing = sorted(info["missing_keys"])[:3]
            raise UserError(
                f"{where}: has no trained classification head (missing weights {missing}); point {key}.source "
                "at a fine-tuned sequence classifier"
            )
        if len(tokenizer) <= len(tokenizer.all_special_ids):
            raise UserError(f"{where}: its tokenizer has no vocabulary; save the classifier's tokenizer in the "
                            "folder (tokenizer.save_pretrained)")
        if tokenizer.pad_token is None and tokenizer.eos_token is not None:
            tokenizer.pad_token = tokenizer.eos_token  # common practice for heads trained without padding
        if model.config.pad_token_id is None:
            model.config.pad_token_id = tokenizer.pad_token_id
        own_limit = _own_max_length(tokenizer, config)
        if section.max_length > own_limit:
            raise UserError(f"{key}.max_length = {section.max_length}: {source} takes at most {own_limit} tokens; "
                            f"set {key}.max_length to {own_limit} or less (0 uses the model's own limit)")

        self.tokenizer, self.model = tokenizer, model.eval()
        self.inputs = set(inspect.signature(model.forward).parameters)  # e.g. DistilBERT takes no token_type_ids
        self.batch_size, self.combine, self.key, self.source = section.batch_size, section.combine, key, source
        self.max_length = section.max_length or own_limit
        rev = f"@{revision}" if revision else ""
        short = {"softmax-logits": "softmax", "sigmoid-logits": "sigmoid", "probabilities": "probability output"}
        self.description = (f"hf classifier {source}{rev} ({short[self.kind]}, harmful: "
                            f"{', '.join(self.labels[i] for i in self.harmful)})")

    def score(self, texts: Sequence[str]) -> Scores:
        import torch

        order = np.argsort([len(t) for t in texts], kind="stable")  # similar lengths share a batch: less padding
        chunks = []
        with torch.no_grad():
            for start in range(0, len(texts), self.batch_size):
                batch = [texts[i] for i in order[start:start + self.batch_size]]
                enc = self.tokenizer(batch, padding=True, truncation=True, max_length=self.max_length,
                                     return_tensors="pt")
                enc = {k: v for k, v in enc.items() if k in self.inputs}
                chunks.append(self.model(**enc).logits.float().cpu().numpy())
        raw = np.zeros((len(texts), len(self.labels)))
        if chunks:
            raw[order] = np.concatenate(chunks)
        if self.kind == "probabilities" and raw.size and (raw.min() < 0 or raw.max() > 1):
            raise UserError(f"{self.key}.source = {self.source!r}: its single output reaches [{raw.min():.4g}, "
                            f"{raw.max():.4g}], so it is not P(harm); set {self.key}.single_output = \"logit\" if "
                            "it is a logit of harm, or use a classifier that gives probabilities")
        harm = combine(_probabilities(raw, self.kind)[:, self.harmful], self.combine)
        return Scores(harm=harm, raw=raw, labels=self.labels, harmful=self.harmful, raw_kind=self.kind)


def _head_reading(config: Any, section: ScorerSection, key: str, where: str) -> tuple[RawKind, str]:
    """How the head's outputs become probabilities, and that assumption in words (printed by the check)."""
    n, problem = config.num_labels, config.problem_type
    said = f"problem_type = {problem!r}" if problem else "no problem_type"
    if section.single_output is not None and n != 1:
        raise UserError(f"{key}.single_output = {section.single_output!r}: only for heads with one output; "
                        f"{section.source} has {n}; remove {key}.single_output")
    if problem == "multi_label_classification":
        what = "one output read as a sigmoid logit" if n == 1 else f"{n} outputs, an independent sigmoid per label"
        return "sigmoid-logits", f"multi-label head ({said}): {what}"
    if n == 1:
        if section.single_output is None:
            # transformers trains a one-output head without a problem_type as regression (mean squared error)
            raise UserError(
                f"{where}: has a single output with {said}, which transformers trains as regression: the output is "
                f"a score, not P(harmful), and alignrun will not guess how to read it. If it is a logit of harm set "
                f'{key}.single_output = "logit" (P(harm) = sigmoid(output)); if it already is P(harm) in [0, 1] '
                f'set {key}.single_output = "probability"')
        if section.single_output == "logit":
            return "sigmoid-logits", f"single-output head ({said}) read as a logit of harm: P(harm) = sigmoid(output), " \
                f"as set by {key}.single_output"
        return "probabilities", f"single-output head ({said}) read as P(harm) itself, as set by {key}.single_output"
    return "softmax-logits", f"softmax over {n} classes ({said})"


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]


def _check_folder(folder: Path, key: str) -> None:
    what = "a Hugging Face sequence-classifier folder (config.json, weights and tokenizer files)"
    if not folder.exists():
        raise UserError(f"{key}.source: folder {folder} does not exist; expected {what}; fix the path")
    if not folder.is_dir():
        raise UserError(f"{key}.source: {folder} is a file, not a folder; expected {what} "
                        f"(for a .joblib/.pkl estimator set {key}.backend = \"sklearn\")")
    if not (folder / "config.json").is_file():
        raise UserError(f"{key}.source: {folder} has no config.json, so it is not a Hugging Face model folder; "
                        f"expected {what}")
    if not any((folder / name).is_file() for name in _TOKENIZER_FILES):
        raise UserError(f"{key}.source: {folder} has no tokenizer (none of {', '.join(_TOKENIZER_FILES)}); "
                        "save the classifier's tokenizer into the folder with tokenizer.save_pretrained(folder)")


def _own_max_length(tokenizer: Any, config: Any) -> int:
    """The shorter of the tokenizer's and the model's own limits, ignoring the 'no limit' sentinel."""
    limits = []
    if 0 < (tokenizer.model_max_length or 0) < _SANE_MAX_LENGTH:
        limits.append(int(tokenizer.model_max_length))
    positions = getattr(config, "max_position_embeddings", None)
    if positions:
        if config.model_type in _PADDING_OFFSET_TYPES:
            positions -= (config.pad_token_id or 0) + 1
        limits.append(int(positions))
    return min(limits) if limits else _FALLBACK_MAX_LENGTH


# ------------------------------------------------------------------------------------------ sklearn


def _import_attr(spec: str, key: str, expected: str) -> Any:
    module_name, sep, attr = spec.partition(":")
    if not sep or not module_name or not attr:
        raise UserError(f"{key}.source = {spec!r}: expected {expected}")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise UserError(f"{key}.source = {spec!r}: cannot import module {module_name!r} ({exc}); install it or "
                        "add its folder to PYTHONPATH") from None
    try:
        return functools.reduce(getattr, attr.split("."), module)
    except AttributeError:
        raise UserError(f"{key}.source = {spec!r}: module {module_name!r} has no attribute {attr!r}; "
                        f"expected {expected}") from None


def _load_estimator(source: str, key: str) -> Any:
    if source.lower().endswith((".joblib", ".pkl", ".pickle")):
        path = Path(source).expanduser()
        if not path.is_file():
            raise UserError(f"{key}.source: file {path} does not exist; expected a .joblib/.pkl file holding a "
                            "fitted estimator with predict_proba")
        import joblib

        try:
            return joblib.load(path)
        except Exception as exc:  # a broken pickle can raise almost anything
            raise UserError(f"{key}.source: could not load {path}: {type(exc).__name__}: {exc}") from None
    expected = "module:attr (an estimator on raw texts), module:vectorizer,model, or a .joblib/.pkl file"
    module_name, _, attrs = source.partition(":")
    names = attrs.split(",")
    if len(names) > 2:
        raise UserError(f"{key}.source = {source!r}: at most two attributes (vectorizer,model); expected {expected}")
    parts = [_import_attr(f"{module_name}:{name.strip()}", key, expected) for name in names]
    if len(parts) == 1:
        return parts[0]
    from sklearn.pipeline import make_pipeline

    return make_pipeline(*parts)


class SklearnScorer:
    """An estimator with predict_proba on raw texts; its label names are its classes_."""

    executes_code = True  # importing a module or unpickling a file runs its code

    def __init__(self, section: ScorerSection, key: str):
        source = section.source
        self.estimator = _load_estimator(source, key)
        if not hasattr(self.estimator, "predict_proba"):
            raise UserError(f"{key}.source = {source!r}: {type(self.estimator).__name__} has no predict_proba; "
                            "expected a fitted classifier that gives class probabilities")
        classes = getattr(self.estimator, "classes_", None)
        if classes is None:
            raise UserError(f"{key}.source = {source!r}: the estimator has no classes_ (is it fitted?)")
        self.labels = [str(c) for c in classes]
        self.harmful = resolve_harmful(section, key, self.labels, named=True, source=source)
        _refuse_all_harmful(key, source, self.harmful, self.labels)
        self.key, self.source, self.combine, self.batch_size = key, source, section.combine, section.batch_size
        try:
            self.estimator.predict_proba(["a short test sentence"])
        except Exception as exc:
            raise UserError(
                f"{key}.source = {source!r}: predict_proba failed on a plain text ({type(exc).__name__}: {exc}); "
                "expected an estimator that takes raw texts (a Pipeline) or module:vectorizer,model"
            ) from None
        self.description = f"sklearn {source} (harmful: {', '.join(self.labels[i] for i in self.harmful)})"
        self.head = f"predict_proba class probabilities for classes_ {self.labels}"

    def score(self, texts: Sequence[str]) -> Scores:
        chunks = [np.asarray(self.estimator.predict_proba(list(texts[i:i + self.batch_size])), dtype=float)
                  for i in range(0, len(texts), self.batch_size)]
        raw = np.concatenate(chunks) if chunks else np.zeros((0, len(self.labels)))
        if raw.shape != (len(texts), len(self.labels)) or not np.isfinite(raw).all():
            raise UserError(f"{self.key}.source = {self.source!r}: predict_proba returned shape {raw.shape} or "
                            f"non-finite values; expected finite [{len(texts)}, {len(self.labels)}] probabilities")
        harm = combine(raw[:, self.harmful], self.combine)
        return Scores(harm=harm, raw=raw, labels=self.labels, harmful=self.harmful)


# ----------------------------------------------------------------------------------------- callable


class CallableScorer:
    """module:function(list[str]) -> [n] P(harm), or [n, C] class probabilities with harmful_index."""

    executes_code = True

    def __init__(self, section: ScorerSection, key: str):
        self.key, self.source, self.section = key, section.source, section
        expected = "module:function taking a list of texts"
        self.function: Callable[[list[str]], Any] = _import_attr(section.source, key, expected)
        if not callable(self.function):
            raise UserError(f"{key}.source = {section.source!r}: is a {type(self.function).__name__}, not a "
                            f"function; expected {expected}")
        if section.harmful_labels:
            raise UserError(f"{key}.harmful_labels: a callable has no label names; if it returns [n, C] class "
                            f"probabilities set {key}.harmful_index, if it returns [n] harm probabilities set neither")
        which = f"column {section.harmful_index}" if section.harmful_index is not None else "P(harm)"
        self.description = f"callable {section.source} (harmful: {which})"
        self.head = ("the function's [n, C] return value read as class probabilities" if section.harmful_index
                     is not None else "the function's [n] return value read as P(harm)")

    def score(self, texts: Sequence[str]) -> Scores:
        n, index = len(texts), self.section.harmful_index
        expected = (f"[{n}] harm probabilities, or [{n}, C] class probabilities with {self.key}.harmful_index set, "
                    "all finite and in [0, 1]")
        where = f"{self.key}.source = {self.source!r}"
        try:
            out = self.function(list(texts))
        except Exception as exc:  # the user's own code failed; KeyboardInterrupt still passes
            raise UserError(f"{where}: the function raised {type(exc).__name__}: {exc}") from exc
        try:
            out = np.asarray(out, dtype=float)
        except (TypeError, ValueError) as exc:
            raise UserError(f"{where}: returned something that is not an array of numbers ({exc}); "
                            f"expected {expected}") from None
        if out.ndim not in (1, 2) or out.shape[0] != n:
            raise UserError(f"{where}: returned shape {out.shape} for {n} texts; expected {expected}")
        if not np.isfinite(out).all():
            raise UserError(f"{where}: returned NaN or infinite values; expected {expected}")
        if out.size and (out.min() < 0 or out.max() > 1):
            raise UserError(f"{where}: returned values in [{out.min():.4g}, {out.max():.4g}]; expected {expected}")
        if out.ndim == 1:
            if index is not None:
                raise UserError(f"{where}: returns one harm probability per text, so {self.key}.harmful_index "
                                "must not be set")
            return Scores(harm=out, raw=out[:, None], labels=["harm"], harmful=[0])
        labels = [str(i) for i in range(out.shape[1])]
        harmful = resolve_harmful(self.section, self.key, labels, named=False, source=self.source)
        return Scores(harm=combine(out[:, harmful], self.section.combine), raw=out, labels=labels, harmful=harmful)


def load_scorer(section: ScorerSection, key: str) -> Scorer:
    """Load the classifier named by a [reward] or [evaluation.judge] section; key names it in messages."""
    if section.backend == "hf":
        return HFScorer(section, key)
    if section.backend == "sklearn":
        return SklearnScorer(section, key)
    return CallableScorer(section, key)


# ---------------------------------------------------------------------------------------- transform


def _log_odds(harm: np.ndarray) -> np.ndarray:
    p = np.clip(harm, EPS, 1 - EPS)
    return np.log((1 - p) / p)  # log-odds of benign: logit(1 - p)


def reward_from_scores(scores: Scores, section: RewardSection) -> np.ndarray:
    """[n] sequence reward: transform(P(harm)), then scale * value + shift, then the optional clip."""
    if section.transform == "neg-harm":
        value = -scores.harm
    elif section.transform == "logit-margin" and scores.raw_kind == "softmax-logits":
        benign = [j for j in range(scores.raw.shape[1]) if j not in scores.harmful]
        # log(sum_benign p / sum_harmful p) computed from logits: logsumexp(benign) - logsumexp(harmful)
        value = logsumexp(scores.raw[:, benign], axis=1) - logsumexp(scores.raw[:, scores.harmful], axis=1)
    else:  # log-odds, and logit-margin for backends without softmax logits
        value = _log_odds(scores.harm)
    reward = section.scale * value + section.shift
    if section.clip is not None:
        reward = np.clip(reward, -section.clip, section.clip)
    return reward


def describe_transform(section: RewardSection) -> str:
    """The reward formula in words, e.g. 'reward = 1.0 * (-P(hostile)) + 0.0, clipped to [-5, 5]'."""
    p = _harm_name(section)
    odds = f"log((1 - P) / P) with P = {p} clipped to [{EPS:g}, 1 - {EPS:g}]"
    if section.transform == "neg-harm":
        inner, note = f"(-{p})", ""
    elif section.transform == "log-odds":
        inner, note = f"({odds})", ""
    elif section.backend == "hf":
        inner = "(logsumexp of benign-class logits - logsumexp of harmful-class logits)"
        note = f"; for multi-label heads {odds}"
    else:
        inner = f"({odds})"
        note = f"; the {section.backend} backend gives probabilities only, so logit-margin falls back to log-odds"
    text = f"reward = {section.scale} * {inner} + {section.shift}"
    if section.clip is not None:
        text += f", clipped to [-{section.clip:g}, {section.clip:g}]"
    return text + note
