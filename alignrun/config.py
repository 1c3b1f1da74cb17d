"""Experiment configuration: schema, defaults, TOML loading, `extends`, `--set` overrides, error messages.

Every default lives in the section classes below. Loading is: read TOML -> follow `extends` (cycles
refused) -> resolve relative paths against the file that set them -> merge -> apply `--set` -> validate.
"""

from __future__ import annotations

import difflib
import os
import sys
import types
from pathlib import Path
from typing import Any, Literal, Union, get_args, get_origin

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator
from pydantic.fields import FieldInfo
from pydantic_core import ErrorDetails

from alignrun.errors import UserError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

import tomli_w


class Section(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, validate_default=True, allow_inf_nan=False)


class BaseSection(Section):
    """[base] the language model the adapters are trained on: encoder-decoder (seq2seq) or decoder-only (causal)."""

    model: str = Field(min_length=1, description="local folder or hub name of an encoder-decoder or decoder-only LM")
    kind: Literal["auto", "seq2seq", "causal"] = Field(
        "auto", description="auto reads the model config (is_encoder_decoder); set it only to override that")
    prompt_format: Literal["plain", "chat"] = Field(
        "plain", description="causal models: plain = the prompt text then prompt_separator; chat = the tokenizer's "
        "chat template with the prompt as one user turn and the assistant turn opened")
    prompt_separator: str = Field("\n", description="causal models, plain format: text put between prompt and reply")
    revision: str | None = Field(None, description="hub revision (branch, tag or commit)")
    trust_remote_code: bool = Field(False, description="run model code shipped with the weights (code execution)")
    device: Literal["auto", "cpu", "cuda"] = Field("auto", description="auto uses a GPU only when one is present")
    threads: int = Field(0, ge=0, le=1024, description="CPU threads; 0 means OMP_NUM_THREADS if set, else the "
                         "CPUs this process may use (affinity mask, cgroup CPU quota)")
    precision: Literal["fp32", "bf16"] = Field(
        "fp32", description="compute precision; bf16 = autocast plus frozen linear weights stored in bf16 (CPUs with "
        "avx512_bf16/AMX, or a GPU)")


class LoraSection(Section):
    """[lora] low-rank adapters (Hu et al. 2021)."""

    rank: int = Field(8, ge=1, le=1024)
    alpha: float = Field(16.0, gt=0)
    dropout: float = Field(0.0, ge=0, lt=1, description="recorded in the saved adapter's config for later training; "
                           "alignrun itself keeps every dropout off, LoRA's included, so that rollouts and updates see "
                           "the same policy (STACK-NOTES)")
    targets: str | list[str] = Field("auto", description='"auto" (query/value projections), "all-linear", or module names')
    scope: Literal["decoder", "encoder-decoder"] = Field(
        "decoder", description="which stacks get adapters; with 'decoder' the frozen encoder runs once per step and its "
        "output is reused by sampling, the reference and every PPO epoch (about a third less compute per step); "
        "a decoder-only model is one decoder stack, so 'decoder' is its whole stack and 'encoder-decoder' is refused"
    )


class ReferenceSection(Section):
    """[reference] the frozen model the KL penalty measures drift from."""

    mode: Literal["adapters-off", "copy"] = Field(
        "adapters-off", description="adapters-off shares the base weights; copy keeps a second frozen model (more memory)"
    )


class ScorerSection(Section):
    """A text classifier that gives P(harmful) per text; used by [reward] and [evaluation.judge]."""

    backend: Literal["hf", "sklearn", "callable"] = "hf"
    source: str = Field(
        min_length=1,
        description="hf: folder or hub name; sklearn: module:attr (or module:vectorizer,model) or a .joblib file; "
        "callable: module:function"
    )
    revision: str | None = None
    harmful_labels: list[str] = Field(default_factory=list, description="the classifier's own names of the harmful classes")
    harmful_index: int | None = Field(None, ge=0, description="only for models without label names; needs a passing probe check")
    combine: Literal["max", "noisy-or"] = Field("max", description="how several harmful labels combine: max p, or 1 - prod(1 - p)")
    batch_size: int = Field(32, ge=1, le=4096)
    max_length: int = Field(0, ge=0, description="truncation length in tokens; 0 uses the classifier's own maximum")
    single_output: Literal["logit", "probability"] | None = Field(
        None, description="hf heads with one output trained as regression: read it as a logit of harm (sigmoid) "
        "or as P(harm) itself; one-output multi-label heads are a sigmoid logit already")
    min_auroc: float = Field(0.8, gt=0.5, le=1.0, description="polarity preflight: harm AUROC needed to call it ok")
    min_separation: float = Field(0.3, gt=0, le=1.0, description="polarity preflight: mean P(harm) on harmful "
                                  "probes minus on benign probes needed; below it the scores barely move")

    @model_validator(mode="after")
    def _one_way_to_name_harm(self) -> ScorerSection:
        if self.harmful_labels and self.harmful_index is not None:
            raise ValueError("set either harmful_labels or harmful_index, not both")
        return self


class RewardSection(ScorerSection):
    """[reward] the classifier reward and its explicit transform."""

    transform: Literal["neg-harm", "logit-margin", "log-odds"] = Field(
        "neg-harm", description="neg-harm: -p; logit-margin: benign minus harmful logit; log-odds: log((1-p)/p)"
    )
    scale: float = 1.0
    shift: float = 0.0
    clip: float | None = Field(None, gt=0, description="clip the reward to [-clip, clip] after scale and shift")
    probes: list[str] = Field(default_factory=list, description="extra probe files: JSONL rows with text, label "
                             "(harmful or benign) and kind")


class KLSection(Section):
    """[kl] per-token KL penalty against the reference (Ziegler et al. 2019)."""

    coef: float = Field(0.1, ge=0, description="beta; the starting value when target is set")
    target: float | None = Field(None, gt=0, description="set to adapt beta towards this KL per sample (Ziegler et al. 2019)")
    gain: float = Field(0.1, gt=0, le=1, description="K_beta of the adaptive controller per step, when kl.horizon = 0")
    # 160 replies = the gain 0.1 per step at the default 16 prompts per step, whatever prompts_per_step is; the
    # paper's 10,000 left beta where it started over a quick demo run (0.0996 from 0.1; see README)
    horizon: int = Field(160, ge=0, description="H in replies: beta <- beta (1 + e n / H), n = replies per step, so "
                         "beta's speed per reply does not depend on ppo.prompts_per_step; 0 uses kl.gain per step")


class PPOSection(Section):
    """[ppo] the clipped policy-optimisation update (Schulman et al. 2017)."""

    steps: int = Field(20, ge=1, le=1_000_000)
    prompts_per_step: int = Field(16, ge=1, le=65536, description="prompts per step, each sampled "
                                  "method.samples_per_prompt times")
    minibatch: int = Field(8, ge=1, le=65536, description="prompts per minibatch (with their "
                           "method.samples_per_prompt replies each)")
    epochs: int = Field(4, ge=1, le=100)
    learning_rate: float = Field(1e-4, gt=0, le=1)
    clip_epsilon: float = Field(0.2, gt=0, lt=1)
    value_clip: float = Field(0.2, ge=0, description="largest change of a value estimate per rollout, in standard "
                              "deviations of the step's returns (Huang et al. 2022); 0 turns value clipping off")
    value_weight: float = Field(0.5, ge=0)
    gamma: float = Field(1.0, ge=0, le=1)
    gae_lambda: float = Field(0.95, ge=0, le=1)
    max_grad_norm: float = Field(1.0, gt=0)
    whiten_advantages: bool = True
    weight_decay: float = Field(0.0, ge=0, description="AdamW's decoupled weight decay on adapters and value head; "
                                "above 0 it pulls the adapters towards zero, i.e. towards the base model")

    @model_validator(mode="after")
    def _minibatch_divides(self) -> PPOSection:
        if self.prompts_per_step % self.minibatch:
            raise ValueError(
                f"minibatch ({self.minibatch}) must divide prompts_per_step ({self.prompts_per_step}); "
                f"try minibatch = {_largest_divisor(self.prompts_per_step, self.minibatch)}"
            )
        return self


class MethodSection(Section):
    """[method] how the policy is optimised; the optimiser's settings (steps, sizes, epochs, rate, clipping) stay in
    [ppo] for every method."""

    name: Literal["ppo", "rloo", "grpo"] = Field(
        "ppo", description="ppo: value head and GAE, KL penalty in the reward (Schulman et al. 2017); rloo: leave-one-out "
        "baseline over the prompt's k replies, KL penalty in the reward (Ahmadian et al. 2024); grpo: group-relative "
        "advantages, k3 KL as a loss term (Shao et al. 2024)")
    samples_per_prompt: int = Field(1, ge=1, le=256, description="k replies sampled per prompt per step; ppo.prompts_per_step "
                                    "and ppo.minibatch count prompts, so a step holds prompts_per_step x k replies and a "
                                    "minibatch minibatch x k; rloo and grpo need k >= 2")
    group_std: Literal["sample", "population", "none"] = Field(
        "sample", description="grpo only: divide R - group mean by the group's sample std (n - 1), population std (n), "
        "or not at all (Liu et al. 2025)")
    loss_average: Literal["tokens", "replies"] = Field(
        "tokens", description="how per-token losses (policy, value, k3 KL) are averaged: over all tokens of the minibatch, "
        "or per reply and then over replies (the GRPO paper's form, which weighs a short reply's tokens more; Liu et al. 2025)")

    @model_validator(mode="after")
    def _groups_need_two(self) -> MethodSection:
        if self.name != "ppo" and self.samples_per_prompt < 2:
            raise ValueError(
                f"name = '{self.name}' uses the other replies to the same prompt as the baseline, so it needs "
                f"samples_per_prompt >= 2 (it is {self.samples_per_prompt}); set method.samples_per_prompt = 4, say")
        return self


class GenerationSection(Section):
    """[generation] sampling limits (training rollouts always sample at temperature 1, no top-k/top-p)."""

    max_new_tokens: int = Field(32, ge=1, le=4096)
    max_prompt_tokens: int = Field(64, ge=1, le=8192)


class DataSection(Section):
    """[data] prompts: JSONL, CSV, Parquet or a saved dataset folder."""

    prompts: str = Field(min_length=1, description="training prompts (and held-out ones, unless heldout is set)")
    heldout: str | None = Field(None, min_length=1, description="explicit held-out prompts; otherwise split from prompts by seed")
    text_field: str = Field("prompt", min_length=1, description="the column or JSON field holding the prompt text")
    heldout_share: float = Field(0.2, gt=0, lt=1)
    bad_rows: Literal["error", "skip"] = "error"
    max_chars: int = Field(2000, ge=1)


def _default_judge() -> ScorerSection:
    # alt-profanity-check's own vectorizer + linear model, trained independently of this project.
    return ScorerSection(backend="sklearn", source="profanity_check.profanity_check:vectorizer,model", harmful_labels=["1"])


class EvaluationSection(Section):
    """[evaluation] held-out before/after measurement with an outside judge."""

    samples_per_prompt: int = Field(4, ge=1, le=1000, description="k samples per prompt (Gehman et al. 2020)")
    max_prompts: int = Field(0, ge=0, description="0 evaluates every held-out prompt")
    harm_threshold: float = Field(0.5, gt=0, lt=1)
    bootstrap_resamples: int = Field(1000, ge=100, le=100_000)
    judge: ScorerSection | None = Field(default_factory=_default_judge, description="a second, independent classifier")
    kl_ceiling: float = Field(10.0, gt=0, description="KL alarm above this many nats per reply when kl.target is "
                              "not set (a chosen default, not from a source); with kl.target the limit is twice it")
    repetition_threshold: float = Field(0.2, ge=0, lt=1, description="a reply loops when its seq-rep-4 (share of "
                                        "repeated word 4-grams, Welleck et al. 2019) is above this")
    repetition_margin: float = Field(0.02, ge=0, le=1, description="alarm when the share of looping replies rises "
                                     "by more than this")
    truncation_margin: float = Field(0.02, ge=0, le=1, description="alarm when the share of replies cut off at "
                                     "generation.max_new_tokens rises by more than this")


class RunSection(Section):
    """[run] where results go and how they are made repeatable."""

    name: str = Field("experiment", min_length=1)
    out: str | None = Field(None, description="run folder; default runs/<name> under the working folder")
    seed: int = Field(0, ge=0)
    checkpoint_every: int = Field(0, ge=0, description="steps between checkpoints; 0 saves only on exit")
    trackers: list[Literal["tensorboard", "mlflow", "wandb", "trackio", "comet_ml", "aim", "clearml", "dvclive",
                           "swanlab"]] = Field(
        default_factory=list, description="experiment trackers to log to through accelerate, e.g. [\"tensorboard\"]")
    tracker_dir: str | None = Field(None, description="tracker files (TensorBoard events, MLflow file store); "
                                    "default trackers/ under the working folder")


class SweepSection(Section):
    """[sweep] trials over config keys; each trial is one normal run."""

    grid: dict[str, list[Any]] = Field(default_factory=dict, description='dotted keys to value lists, e.g. "kl.coef" = [0.05, 0.2]')
    seeds: list[int] = Field(default_factory=list, description="repeat every grid point with these seeds")
    out: str | None = None


class Experiment(Section):
    base: BaseSection
    lora: LoraSection = Field(default_factory=LoraSection)
    reference: ReferenceSection = Field(default_factory=ReferenceSection)
    reward: RewardSection
    kl: KLSection = Field(default_factory=KLSection)
    ppo: PPOSection = Field(default_factory=PPOSection)
    method: MethodSection = Field(default_factory=MethodSection)
    generation: GenerationSection = Field(default_factory=GenerationSection)
    data: DataSection
    evaluation: EvaluationSection = Field(default_factory=EvaluationSection)
    run: RunSection = Field(default_factory=RunSection)
    sweep: SweepSection | None = None


def _largest_divisor(n: int, at_most: int) -> int:
    return max(d for d in range(1, min(n, at_most) + 1) if n % d == 0)


# Keys whose values are file paths (always resolved) or model sources (resolved when they look like paths).
PATH_KEYS = {"data.prompts", "data.heldout", "reward.probes", "run.out", "run.tracker_dir", "sweep.out"}
SOURCE_KEYS = {"base.model", "reward.source", "evaluation.judge.source"}


def cache_dir() -> Path:
    """Where built demo/test models live: $ALIGNRUN_CACHE, else the user's cache folder."""
    if os.environ.get("ALIGNRUN_CACHE"):
        return Path(os.environ["ALIGNRUN_CACHE"]).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "alignrun"


def _resolve_one(value: str, folder: Path, source_like: bool) -> str:
    if not value:
        return value  # left for validation to reject, not turned into the config's own folder
    value = value.replace("{cache}", str(cache_dir()))
    p = Path(value).expanduser()
    if p.is_absolute():
        return str(p)
    if source_like and not (value.startswith(".") or (folder / p).exists()):
        return value  # a hub name or an importable module, not a path
    return str((folder / p).resolve())


def _resolve_paths(tree: dict[str, Any], folder: Path, prefix: str = "") -> None:
    for key, value in tree.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, dict):
            _resolve_paths(value, folder, dotted + ".")
        elif dotted in PATH_KEYS or dotted in SOURCE_KEYS:
            source_like = dotted in SOURCE_KEYS
            is_module = source_like and isinstance(value, str) and ":" in value and not Path(value).exists()
            if isinstance(value, str) and not is_module:
                tree[key] = _resolve_one(value, folder, source_like)
            elif isinstance(value, list):
                tree[key] = [_resolve_one(v, folder, source_like) if isinstance(v, str) else v for v in value]


def _merge(into: dict[str, Any], new: dict[str, Any], origin: dict[str, str], where: str, prefix: str = "") -> None:
    for key, value in new.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, dict) and isinstance(into.get(key), dict):
            _merge(into[key], value, origin, where, dotted + ".")
        else:
            into[key] = value
            _note_origin(value, origin, where, dotted)


def _note_origin(value: Any, origin: dict[str, str], where: str, dotted: str) -> None:
    origin[dotted] = where
    if isinstance(value, dict):
        for k, v in value.items():
            _note_origin(v, origin, where, f"{dotted}.{k}")


def _read_toml(path: Path) -> dict[str, Any]:
    if path.is_dir():
        raise UserError(f"{path}: is a folder (expected a TOML config file)")
    if not path.is_file():
        raise UserError(f"{path}: config file not found (expected a TOML file; check the path)")
    try:
        with path.open("rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a text file (expected UTF-8 TOML)") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read the config file ({exc.strerror})") from None


def _load_tree(path: Path, origin: dict[str, str], chain: tuple[Path, ...] = ()) -> dict[str, Any]:
    path = path.resolve()
    if path in chain:
        cycle = " -> ".join(str(p) for p in (*chain, path))
        raise UserError(f"{chain[-1]}: key 'extends' makes a cycle: {cycle}; remove one of the 'extends' lines")
    raw = _read_toml(path)
    _resolve_paths(raw, path.parent)
    parent = raw.pop("extends", None)
    merged: dict[str, Any] = {}
    if parent is not None:
        if not isinstance(parent, str):
            raise UserError(f"{path}: key 'extends' must be a file name (string), found {parent!r}")
        parent_path = (path.parent / parent).expanduser()
        if not parent_path.is_file():
            raise UserError(f"{path}: key 'extends' names {parent_path}, which does not exist")
        merged = _load_tree(parent_path, origin, (*chain, path))
    _merge(merged, raw, origin, str(path))
    return merged


def parse_override(text: str) -> tuple[list[str], Any]:
    """`kl.coef=0.1` -> (["kl", "coef"], 0.1); values are TOML literals, bare words are strings."""
    key, sep, value = text.partition("=")
    key = key.strip()
    parts = key.split(".")
    if not sep or not key or any(not p.strip() for p in parts):
        raise UserError(f"--set {text!r}: expected KEY=VALUE with a dotted key, e.g. --set kl.coef=0.1")
    try:
        parsed = tomllib.loads(f"v = {value.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        parsed = value.strip()
    return [p.strip() for p in parts], parsed


def apply_override(tree: dict[str, Any], text: str, origin: dict[str, str]) -> None:
    parts, value = parse_override(text)
    dotted = ".".join(parts)
    if isinstance(value, str) and dotted in PATH_KEYS | SOURCE_KEYS:
        value = _resolve_one(value, Path.cwd(), dotted in SOURCE_KEYS)
    node = tree
    for i, part in enumerate(parts[:-1]):
        child = node.setdefault(part, {})
        if not isinstance(child, dict):
            raise UserError(f"--set {text!r}: '{'.'.join(parts[: i + 1])}' is a value, not a section")
        node = child
    node[parts[-1]] = value
    origin[dotted] = f"--set {text}"


def _nested_model(field: FieldInfo) -> type[BaseModel] | None:
    nested = [a for a in _members(field.annotation) if get_origin(a) is None and isinstance(a, type)
              and issubclass(a, BaseModel)]
    return nested[0] if nested else None


def _members(annotation: Any) -> list[Any]:
    """The non-None members of a union annotation, or the annotation itself."""
    if get_origin(annotation) in (Union, types.UnionType):
        return [a for a in get_args(annotation) if a is not type(None)]
    return [annotation]


def _allowed_keys(model: type[BaseModel], loc: tuple[Any, ...]) -> list[str]:
    for part in loc:
        field = model.model_fields.get(str(part))
        nested = _nested_model(field) if field is not None else None
        if nested is None:
            return []
        model = nested
    return list(model.model_fields)


def _key_of(loc: tuple[Any, ...]) -> tuple[str, FieldInfo | None]:
    """A pydantic error location as the user's dotted key (union-member tags dropped, list items as [i])."""
    model: type[BaseModel] | None = Experiment
    key, field, skip_tag = "", None, False
    for part in loc:
        if isinstance(part, str) and (skip_tag or part.startswith("function-after")):
            skip_tag = False
            continue
        if isinstance(part, int):
            key, model, skip_tag = f"{key}[{part}]", None, False
            continue
        key = f"{key}.{part}" if key else str(part)
        field = model.model_fields.get(part) if model is not None else None
        model = _nested_model(field) if field is not None else None
        # pydantic tags each member of a union like `str | list[str]`; the tag is not a user key
        skip_tag = field is not None and model is None and len(_members(field.annotation)) > 1
    return key, field


def _where(key: str, origin: dict[str, str], default_file: str, whole_section: bool = False) -> str:
    """The file or --set that set `key`, else whatever set keys below or beside it.

    whole_section: name every source of the keys inside `key` (a check across several keys of a section).
    """
    parts = key.split("[")[0].split(".") if key else []
    for n in range(len(parts), 0, -1):
        prefix = ".".join(parts[:n])
        if prefix in origin and not whole_section:
            return origin[prefix]
        found = [w for k, w in origin.items() if k == prefix or k.startswith(prefix + ".")]
        if found:
            return " + ".join(dict.fromkeys(found))
    return default_file


def _describe_error(err: ErrorDetails, origin: dict[str, str], default_file: str) -> str:
    loc = tuple(err["loc"])
    dotted, field = _key_of(loc)
    kind = err["type"]
    where = _where(dotted, origin, default_file, whole_section=kind == "value_error")
    if kind == "extra_forbidden":
        allowed = _allowed_keys(Experiment, loc[:-1])
        hint = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
        did = f"; did you mean '{hint[0]}'?" if hint else ""
        section = dotted.rpartition(".")[0] or "top level"
        return f"{where}: unknown key '{dotted}'{did} (keys allowed in [{section}]: {', '.join(allowed)})"
    if kind == "missing":
        what = f" ({field.description})" if field is not None and field.description else ""
        return f"{where}: required key '{dotted}' is missing{what}"
    expected = err["msg"]
    if kind == "value_error":
        expected = expected.removeprefix("Value error, ")
        return f"{where}: [{dotted or 'config'}] {expected}"
    return f"{where}: key '{dotted}' has value {err.get('input')!r}; expected: {expected}"


def _describe_errors(exc: ValidationError, origin: dict[str, str], default_file: str) -> list[str]:
    """One line per problem; the members of a union (e.g. string or list) share one line."""
    lines: dict[tuple[str, str], str] = {}
    for err in exc.errors():
        line = _describe_error(err, origin, default_file)
        head, sep, expected = line.partition("; expected: ")
        if sep and (head, sep) in lines:
            lines[head, sep] += f", or {expected}"
        else:
            lines[head, sep] = line
    return list(lines.values())


def load_config(path: str | Path, overrides: list[str] | tuple[str, ...] = ()) -> Experiment:
    """Load, merge, override and validate one experiment config; raises UserError with every problem listed."""
    path = Path(path)
    origin: dict[str, str] = {}
    tree = _load_tree(path, origin)
    for text in overrides:
        apply_override(tree, text, origin)
    if isinstance(tree.setdefault("run", {}), dict):
        tree["run"].setdefault("name", path.stem)
    try:
        return Experiment.model_validate(tree)
    except ValidationError as exc:
        raise UserError("invalid config:\n  " + "\n  ".join(_describe_errors(exc, origin, str(path)))) from None


def to_toml(cfg: Experiment) -> str:
    """The fully resolved config, defaults included, as TOML that loads back to the same values."""
    return tomli_w.dumps(cfg.model_dump(mode="json", exclude_none=True))


def flatten(tree: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """A nested config dict as {dotted key: value}."""
    flat: dict[str, Any] = {}
    for key, value in tree.items():
        if isinstance(value, dict):
            flat.update(flatten(value, f"{prefix}{key}."))
        else:
            flat[prefix + key] = value
    return flat


def with_overrides(cfg: Experiment, updates: dict[str, Any]) -> Experiment:
    """A copy of cfg with dotted keys replaced, validated again (used by sweeps)."""
    tree = cfg.model_dump(mode="json", exclude_none=True)
    origin: dict[str, str] = {}
    for key, value in updates.items():
        node = tree
        parts = key.split(".")
        for part in parts[:-1]:
            node = node.setdefault(part, {})
        node[parts[-1]] = value
        origin[key] = "sweep"
    try:
        return Experiment.model_validate(tree)
    except ValidationError as exc:
        raise UserError("invalid sweep trial:\n  " + "\n  ".join(_describe_errors(exc, origin, "sweep"))) from None


# keys that name or pace a run without changing its numbers; every other key must match on --resume
NOT_RESULT_KEYS = {"run.name", "run.out", "run.checkpoint_every", "run.trackers", "run.tracker_dir"}


def result_differences(saved: Experiment, cfg: Experiment) -> list[str]:
    """'key: X in the run, Y now' for every key that changes a run's result and differs between the configs."""
    old, new = (flatten(c.model_dump(mode="json", exclude={"sweep"})) for c in (saved, cfg))
    keys = [k for k in dict.fromkeys([*old, *new]) if k not in NOT_RESULT_KEYS and old.get(k) != new.get(k)]
    return [f"{k}: {old.get(k)!r} in the run, {new.get(k)!r} now" for k in keys]
