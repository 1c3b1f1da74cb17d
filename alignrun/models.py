"""Models: the base (encoder-decoder or decoder-only), LoRA adapters (Hu et al. 2021), the value head, the frozen
reference, export. `Policy` is the one interface the loop uses; the two kinds of base differ only here:

    seq2seq  prompt -> encoder; reply positions fed the decoder start token + reply[:-1]
    causal   prompt (formatted, left-padded) + reply[:-1] in one sequence, position ids counted over real tokens;
             the logits and hidden states of the last T positions belong to the reply

In both, `decoder_input` [B, T] holds the token fed at each reply position (seq2seq: the start token first; causal:
the prompt's last token first), so rollout, evaluation and the trainer never ask which kind they drive."""

from __future__ import annotations

import copy
import ctypes
import functools
import mmap
import os
import re
import shutil
import sys
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from peft import LoraConfig, PeftModel, TaskType, get_peft_model, set_peft_model_state_dict
from safetensors.torch import load_file, save_file
from torch import nn
from transformers import (
    AutoConfig,
    AutoModelForCausalLM,
    AutoModelForSeq2SeqLM,
    AutoTokenizer,
    GenerationConfig,
    PreTrainedTokenizerBase,
)
from transformers.modeling_outputs import BaseModelOutput
from transformers.models.auto.modeling_auto import MODEL_FOR_CAUSAL_LM_MAPPING_NAMES
from transformers.pytorch_utils import Conv1D
from trl.trainer.utils import disable_dropout_in_model

from alignrun import cpu
from alignrun.config import BaseSection, LoraSection, ReferenceSection
from alignrun.cpu import ThreadChoice, choose_threads
from alignrun.errors import UserError
from alignrun.runfolder import inside, replace_folder, staging_folder

# Attention query/value projections per architecture family: LoRA's default placement (Hu et al. 2021, §4.2).
QUERY_VALUE = {
    "t5": ["q", "v"], "mt5": ["q", "v"], "umt5": ["q", "v"], "longt5": ["q", "v"],
    "bart": ["q_proj", "v_proj"], "mbart": ["q_proj", "v_proj"], "pegasus": ["q_proj", "v_proj"],
    "marian": ["q_proj", "v_proj"], "blenderbot": ["q_proj", "v_proj"], "blenderbot-small": ["q_proj", "v_proj"],
    "m2m_100": ["q_proj", "v_proj"], "nllb-moe": ["q_proj", "v_proj"], "plbart": ["q_proj", "v_proj"],
    "pegasus_x": ["q_proj", "v_proj"], "led": ["q_proj", "v_proj"], "bigbird_pegasus": ["q_proj", "v_proj"],
    # decoder-only: GPT-2's query/key/value are one fused Conv1D (adapting it adapts k too); Phi-3's one fused Linear
    "gpt2": ["c_attn"], "phi3": ["qkv_proj"], "gpt_neox": ["query_key_value"], "falcon": ["query_key_value"],
    "bloom": ["query_key_value"],
    **{family: ["q_proj", "v_proj"] for family in (
        "llama", "mistral", "mixtral", "qwen2", "qwen3", "gemma", "gemma2", "gemma3_text", "phi", "olmo", "olmo2",
        "opt", "gpt_neo", "gptj", "stablelm", "starcoder2", "granite", "smollm3", "cohere")},
}


# A saved tokenizer has at least one of these (fast JSON, WordPiece/BPE vocabularies, sentencepiece); without
# them transformers 5 quietly builds a tokenizer with no vocabulary.
_TOKENIZER_FILES = ("tokenizer.json", "vocab.txt", "vocab.json", "spiece.model", "sentencepiece.bpe.model",
                    "tokenizer.model")


def pick_device(section: BaseSection) -> torch.device:
    if section.device == "cuda" and not torch.cuda.is_available():
        raise UserError("base.device = 'cuda' but no GPU is visible; use 'auto' or 'cpu'")
    return torch.device("cuda" if section.device != "cpu" and torch.cuda.is_available() else "cpu")


def set_threads(threads: int) -> ThreadChoice:
    """torch's thread count: base.threads, else what the user set, else the CPUs this process may use, lowered
    between steps while other programs keep some of them busy (cpu.ThreadGovernor)."""
    choice = choose_threads(threads)
    torch.set_num_threads(choice.threads)
    cpu.govern(cpu.ThreadGovernor(choice.threads, cpu.affinity_cpus(), torch.set_num_threads)
               if choice.adaptive else None)
    return choice


def autocast(precision: str, device: torch.device) -> torch.autocast | nullcontext[None]:
    """bf16 autocast when asked for; fp32 runs plain."""
    if precision == "bf16":
        return torch.autocast(device.type, dtype=torch.bfloat16)
    return nullcontext()


def _hub_hint(source: str, exc: Exception) -> str:
    offline = os.environ.get("HF_HUB_OFFLINE") == "1" or os.environ.get("TRANSFORMERS_OFFLINE") == "1"
    looks_local = source.startswith((".", "/", "~")) or os.sep in source and Path(source).parent.exists()
    if looks_local:
        if Path(source).expanduser().is_dir():
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            return f"folder {source} is not a loadable model folder: {first}"
        return f"folder {source} does not exist; fix the path"
    return (f"{source!r} is not a local folder and could not be loaded from the hub cache"
            f"{' (offline mode is on)' if offline else ''}: {exc}. Download it where you have a connection "
            "and point base.model at the folder")


def is_causal(section: BaseSection, config: Any) -> bool:
    """Decoder-only unless the config says encoder-decoder; base.kind overrides the config."""
    return section.kind == "causal" or section.kind == "auto" and not getattr(config, "is_encoder_decoder", False)


def load_base(section: BaseSection, device: torch.device) -> tuple[nn.Module, PreTrainedTokenizerBase]:
    """The base (seq2seq or causal LM, from its config) and its tokenizer; refuses non-LM folders clearly. A causal
    model's tokenizer pads and truncates on the left (the prompt's end, where the reply starts, is kept)."""
    if section.trust_remote_code:
        print("alignrun: WARNING base.trust_remote_code = true: code shipped with the model will run", flush=True)
    kwargs = {"revision": section.revision, "trust_remote_code": section.trust_remote_code}
    try:
        config = AutoConfig.from_pretrained(section.model, **kwargs)
    except (OSError, ValueError) as exc:
        raise UserError(f"base.model: {_hub_hint(section.model, exc)}") from None
    causal = is_causal(section, config)
    what = "causal (decoder-only)" if causal else "seq2seq (encoder-decoder)"
    saved_as = getattr(config, "architectures", None) or []  # e.g. a classifier of a family that also has an LM head
    if causal and section.kind == "auto" and saved_as and not set(saved_as) & set(MODEL_FOR_CAUSAL_LM_MAPPING_NAMES.values()):
        raise UserError(f"base.model: {section.model} is a {config.model_type!r} model, not an encoder-decoder or "
                        f"decoder-only language model that writes text (saved as {', '.join(saved_as)}); point "
                        "base.model at a T5-, BART-style seq2seq or a GPT-2-, Llama-, Qwen-, Phi-style causal LM")
    try:
        # fp32 whatever dtype the checkpoint was saved in: the adapters and the optimizer need it
        loader: Any = AutoModelForCausalLM if causal else AutoModelForSeq2SeqLM
        model = loader.from_pretrained(section.model, dtype=torch.float32, **kwargs)
    except ValueError as exc:
        raise UserError(f"base.model: {section.model} is a {config.model_type!r} model and cannot be loaded as a {what} "
                        f"language model ({_first_line(exc)}); alignrun trains T5-, BART-style encoder-decoders and "
                        "GPT-2-, Llama-, Qwen-, Phi-style decoder-only LMs") from None
    except Exception as exc:  # safetensors/torch errors from a truncated or overwritten weights file
        raise UserError(f"base.model: {_named_files(section.model, ('*.safetensors', '*.bin'))} cannot be read "
                        f"({_first_line(exc)}); the weights file is damaged or incomplete: copy or save the model "
                        "folder again") from None
    local = Path(section.model).expanduser()
    if local.is_dir() and not any((local / name).is_file() for name in _TOKENIZER_FILES):
        raise UserError(f"base.model: {section.model} has no tokenizer files (none of {', '.join(_TOKENIZER_FILES)}); "
                        "save the tokenizer into the model folder with tokenizer.save_pretrained(folder)")
    try:
        tokenizer = AutoTokenizer.from_pretrained(section.model, **kwargs)
    except Exception as exc:  # OSError/ValueError, or the tokenizers library's own error for a damaged file
        raise UserError(f"base.model: the tokenizer in {_named_files(section.model, _TOKENIZER_FILES)} cannot be "
                        f"read ({_first_line(exc)}); the file is damaged: save the tokenizer into the model folder "
                        "again with tokenizer.save_pretrained(folder)") from None
    if tokenizer.eos_token_id is None:
        raise UserError(f"base.model: the tokenizer of {section.model} has no end-of-sequence (eos) token; replies "
                        "could never end. Set tokenizer.eos_token and save the tokenizer into the model folder again")
    if tokenizer.pad_token_id is None:
        if not causal:
            raise UserError(f"base.model: the tokenizer of {section.model} needs a pad token")
        # Safe because padding is read from the attention mask and a reply ends at its first EOS (rollout.response_mask)
        tokenizer.pad_token = tokenizer.eos_token
        print(f"alignrun: the tokenizer of {section.model} has no pad token; padding with its eos token "
              f"{tokenizer.eos_token!r} (padding is masked by position, never recognised by token)", flush=True)
    if causal:
        tokenizer.padding_side = tokenizer.truncation_side = "left"
    return model.to(device), tokenizer


def _named_files(model: str, patterns: tuple[str, ...]) -> str:
    """The files of a local model folder matching patterns, for messages; the model name itself otherwise."""
    folder = Path(model).expanduser()
    files = sorted({str(p) for pattern in patterns for p in folder.glob(pattern)}) if folder.is_dir() else []
    return ", ".join(files) or model


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]


LINEAR = (nn.Linear, Conv1D)  # GPT-2's projections are transformers' Conv1D: a linear layer with its weight transposed


def linear_leaf_names(model: nn.Module) -> list[str]:
    return sorted({name.rsplit(".", 1)[-1] for name, m in model.named_modules() if isinstance(m, LINEAR)})


def lora_targets(model: nn.Module, spec: str | list[str]) -> str | list[str]:
    """Resolve lora.targets: "auto" -> query/value projections of the detected family; "all-linear"; names."""
    leaves = linear_leaf_names(model)
    model_type = getattr(model.config, "model_type", "")
    if spec == "all-linear":
        return "all-linear"
    if spec == "auto":
        if model_type in QUERY_VALUE:
            return QUERY_VALUE[model_type]
        guess = [n for n in leaves if n in ("q", "v", "q_proj", "v_proj", "query", "value")]
        if len(guess) < 2:
            raise UserError(f"lora.targets = 'auto' does not know the {model_type!r} architecture; "
                            f"set lora.targets to some of its linear layers: {', '.join(leaves)}")
        return guess
    names = [spec] if isinstance(spec, str) else list(spec)
    missing = [n for n in names if n not in leaves]
    if missing:
        raise UserError(f"lora.targets: {', '.join(missing)} not found in {model_type} model; "
                        f"its linear layers are: {', '.join(leaves)} (or use 'auto' / 'all-linear')")
    return names


class ValueHead(nn.Module):
    """A scalar value per reply position from the decoder stack's last hidden state."""

    def __init__(self, hidden: int):
        super().__init__()
        self.summary = nn.Linear(hidden, 1)
        nn.init.zeros_(self.summary.bias)
        nn.init.normal_(self.summary.weight, std=1.0 / (hidden + 1) ** 0.5)

    def forward(self, hidden_states: torch.Tensor) -> torch.Tensor:
        return self.summary(hidden_states.to(self.summary.weight.dtype)).squeeze(-1)


class PolicyWithValue(nn.Module):
    """LoRA-wrapped policy plus value head; one forward gives the reply positions' logits and values.

    The value head reads the hidden states detached: the value loss trains the head only, never the adapters
    (a critic that does not share gradients with the actor, common practice). Sharing them, a fixed kl.coef of
    1.0 on the demo made the KL-laden returns' value loss drag the adapters away: 2 of 3 seeds ended 86-126 nats
    from the base, with looping replies; detached, 0.5 nats."""

    def __init__(self, lm: PeftModel, value_head: ValueHead, causal: bool):
        super().__init__()
        self.lm = lm
        self.value_head = value_head
        self.causal = causal

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor, decoder_input_ids: torch.Tensor,
                encoder_hidden: torch.Tensor | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """Prompt ids/mask [B, P] and the reply positions' inputs [B, T] -> (logits [B, T, V], values [B, T])."""
        with decoder_states(self.lm) as states:
            logits = reply_logits(self.lm, self.causal, input_ids, attention_mask, decoder_input_ids, encoder_hidden)
        return logits, self.value_head(states[0][:, -decoder_input_ids.shape[1]:].detach())


def reply_logits(model: nn.Module, causal: bool, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor,
                 decoder_input: torch.Tensor, encoder_hidden: torch.Tensor | None = None) -> torch.Tensor:
    """Teacher-forced logits at the reply positions [B, T, V] of any model of the policy's kind (policy, reference).

    Causal: the left-padded prompt and the reply in one sequence (decoder_input = the prompt's last token +
    reply[:-1]); position ids count real tokens only, as generate() numbers them under left padding."""
    if not causal:
        return model(input_ids=prompt_ids, attention_mask=prompt_mask, decoder_input_ids=decoder_input,
                     encoder_outputs=encoder_outputs(encoder_hidden), use_cache=False).logits
    ids = torch.cat([prompt_ids, decoder_input[:, 1:]], dim=1)
    mask = torch.cat([prompt_mask, torch.ones_like(decoder_input[:, 1:])], dim=1)
    positions = (mask.cumsum(1) - 1).clamp(min=0)
    return model(input_ids=ids, attention_mask=mask, position_ids=positions, use_cache=False,
                 logits_to_keep=decoder_input.shape[1]).logits


@contextmanager
def decoder_states(lm: nn.Module) -> Iterator[list[torch.Tensor]]:
    """The decoder stack's last hidden state from each of its calls inside the block (one per generation step; a
    causal model's first call covers the whole prompt): the value head's input, without keeping every layer's
    states as output_hidden_states would. For a causal LM get_decoder() is its body, final norm included."""
    kept: list[torch.Tensor] = []
    hook = lm.get_decoder().register_forward_hook(lambda module, args, out: kept.append(out[0]))  # type: ignore[operator]
    try:
        yield kept
    finally:
        hook.remove()


def encoder_outputs(hidden: torch.Tensor | None) -> BaseModelOutput | None:
    """A saved encoder output in the form the seq2seq forward and generate accept (None: encode afresh)."""
    return None if hidden is None else BaseModelOutput(last_hidden_state=hidden)


@dataclass
class Policy:
    net: PolicyWithValue
    tokenizer: PreTrainedTokenizerBase
    reference_copy: nn.Module | None  # only for reference.mode = "copy"
    trainable_params: int
    total_params: int
    encoder_frozen: bool = False  # no adapter in the encoder: its output is computed once per batch and reused
    prompt_format: str = "plain"  # causal: "plain" (prompt + separator) or "chat" (the tokenizer's chat template)
    prompt_separator: str = ""

    @property
    def lm(self) -> PeftModel:
        return self.net.lm

    @property
    def causal(self) -> bool:
        return self.net.causal

    def describe(self) -> str:
        """One line for the run output: the kind of base and how prompts reach it."""
        kind = getattr(self.lm.config, "model_type", "")
        if not self.causal:
            return f"encoder-decoder {kind} model; the prompt is the encoder's input"
        shown = "the tokenizer's chat template" if self.prompt_format == "chat" else \
            f"plain text + separator {self.prompt_separator!r}"
        return (f"decoder-only {kind} model; prompts as {shown}, left-padded; log-probs, KL, values and rewards "
                "cover the reply tokens only")

    def prompt_texts(self, prompts: list[str]) -> list[str]:
        """The text each prompt is encoded as: itself (seq2seq); with the separator or in the chat template (causal)."""
        if not self.causal:
            return prompts
        if self.prompt_format == "plain":
            return [p + self.prompt_separator for p in prompts]
        return [str(self.tokenizer.apply_chat_template([{"role": "user", "content": p}], tokenize=False,
                                                       add_generation_prompt=True)) for p in prompts]

    def encode(self, prompts: list[str], max_tokens: int, device: torch.device) -> tuple[torch.Tensor, torch.Tensor]:
        """Prompt ids and attention mask [B, P], padded (causal: left-padded, truncated from the left)."""
        # a chat template writes its own special tokens; adding the tokenizer's (a second BOS) would change the text
        enc = self.tokenizer(self.prompt_texts(prompts), return_tensors="pt", padding=True, truncation=True,
                             max_length=max_tokens, add_special_tokens=self.prompt_format != "chat" or not self.causal)
        return enc["input_ids"].to(device), enc["attention_mask"].to(device)

    def reply_logits(self, model: nn.Module, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor,
                     decoder_input: torch.Tensor, encoder_hidden: torch.Tensor | None = None) -> torch.Tensor:
        """Teacher-forced reply logits [B, T, V] of `model` (policy.lm or the reference)."""
        return reply_logits(model, self.causal, prompt_ids, prompt_mask, decoder_input, encoder_hidden)

    @contextmanager
    def reference(self) -> Iterator[nn.Module]:
        """The frozen reference: the same weights with adapters disabled (no second copy), or the copy."""
        if self.reference_copy is not None:
            yield self.reference_copy
        else:
            with self.lm.disable_adapter():
                yield self.lm


_DECODER = re.compile(r"(.*\.)?decoder\.")  # module paths inside the decoder stack (T5, BART, Pegasus, ...)


def in_decoder(module_name: str) -> bool:
    return _DECODER.match(module_name) is not None


def _decoder_only(model: nn.Module, targets: str | list[str]) -> str:
    """A peft target pattern for the chosen linear layers of the decoder stack only."""
    output = model.get_output_embeddings()  # type: ignore[operator]
    leaves = sorted({name.rsplit(".", 1)[-1] for name, m in model.named_modules()
                     if isinstance(m, LINEAR) and m is not output and in_decoder(name)
                     and (targets == "all-linear" or name.rsplit(".", 1)[-1] in targets)})
    if not leaves:
        named = targets if isinstance(targets, str) else ", ".join(targets)
        raise UserError(f"lora.scope = 'decoder': none of the layers {named} sits in a 'decoder' module of this "
                        f"{getattr(model.config, 'model_type', '')} model; use lora.scope = 'encoder-decoder'")
    return rf"{_DECODER.pattern}.*\.({'|'.join(re.escape(n) for n in leaves)})"


def wrap_lora(model: nn.Module, lora: LoraSection) -> PeftModel:
    """W' = W + (alpha/r) B A with B = 0 at the start, so the policy equals the base at step 0 (Hu et al. 2021).

    A decoder-only model is one decoder stack: lora.scope = "decoder" adapts the chosen layers wherever they sit."""
    targets = lora_targets(model, lora.targets)
    causal = not getattr(model.config, "is_encoder_decoder", False)
    if causal and lora.scope != "decoder":
        raise UserError(f"lora.scope = {lora.scope!r}: this {getattr(model.config, 'model_type', '')} model is "
                        "decoder-only and has no encoder; use lora.scope = 'decoder' (its whole stack)")
    chosen = [m for name, m in model.named_modules()
              if targets == "all-linear" or name.rsplit(".", 1)[-1] in targets]
    peft_cfg = LoraConfig(task_type=TaskType.CAUSAL_LM if causal else TaskType.SEQ_2_SEQ_LM,
                          r=lora.rank, lora_alpha=lora.alpha, lora_dropout=lora.dropout,  # type: ignore[arg-type]
                          # Conv1D stores W transposed (GPT-2): peft must know, or A and B take the wrong shapes
                          fan_in_fan_out=any(isinstance(m, Conv1D) for m in chosen),
                          target_modules=targets if causal or lora.scope != "decoder" else _decoder_only(model, targets))
    lm = get_peft_model(model, peft_cfg)
    lm.eval()  # dropout stays off in rollouts and updates alike
    return lm


def store_frozen_linear_in_bf16(model: nn.Module) -> None:
    """Under bf16 autocast every frozen linear weight is rounded to bf16 at each matmul anyway, so keeping them in
    bf16 gives the same numbers with half their memory and no cast per call. Adapters (trainable), embeddings and
    an output projection tied to them, norms and the value head stay fp32."""
    tied = model.get_input_embeddings().weight  # type: ignore[operator]
    for module in model.modules():
        if isinstance(module, LINEAR) and not module.weight.requires_grad and module.weight is not tied:
            fp32 = module.weight
            module.weight = nn.Parameter(fp32.detach().to(torch.bfloat16), requires_grad=False)
            _page_out(fp32)


def _page_out(tensor: torch.Tensor) -> None:
    """Hint Linux to drop the resident pages of a tensor no longer used (MADV_PAGEOUT; its data stays valid).

    Checkpoint weights are memory-mapped and stay mapped until every tensor of the file is gone, so converting
    them one by one would otherwise hold all fp32 pages and all bf16 copies at once (measured: a 223M model
    peaked at 1.84 GB instead of 0.88 GB). Elsewhere, or on kernels before 5.4, this does nothing."""
    if not sys.platform.startswith("linux"):
        return
    page = mmap.PAGESIZE
    start = tensor.data_ptr()
    first, last = -(-start // page) * page, (start + tensor.numel() * tensor.element_size()) // page * page
    if last > first:  # whole pages inside the tensor only: its neighbours keep theirs
        _libc().madvise(first, last - first, _MADV_PAGEOUT)


_MADV_PAGEOUT = 21  # linux/mman.h, since Linux 5.4


@functools.cache
def _libc() -> ctypes.CDLL:
    libc = ctypes.CDLL(None, use_errno=True)
    libc.madvise.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int]
    return libc


def neutral_generation_settings(model: nn.Module, tokenizer: PreTrainedTokenizerBase) -> GenerationConfig:
    """Generation settings with the special tokens only. generate() fills every setting a call leaves unset from
    the model's saved generation_config, and saved settings such as forced_eos_token_id, no_repeat_ngram_size,
    min_length, repetition_penalty or suppress_tokens reshape the distribution tokens are drawn from, while PPO
    stores the raw log-probs: samples would no longer come from the policy whose log-probs are kept."""
    config: Any = model.config
    saved: Any = model.generation_config
    start = saved.decoder_start_token_id if saved.decoder_start_token_id is not None else \
        getattr(config, "decoder_start_token_id", None)
    if not getattr(config, "is_encoder_decoder", False):
        start = None  # a decoder-only model continues the prompt: there is no decoder start token
    return GenerationConfig(decoder_start_token_id=start, bos_token_id=saved.bos_token_id,
                            eos_token_id=tokenizer.eos_token_id, pad_token_id=tokenizer.pad_token_id)


def build_policy(base: BaseSection, lora: LoraSection, reference: ReferenceSection,
                 device: torch.device) -> Policy:
    model, tokenizer = load_base(base, device)
    causal = not getattr(model.config, "is_encoder_decoder", False)
    if causal and base.prompt_format == "chat" and not tokenizer.chat_template:
        raise UserError(f"base.prompt_format = 'chat': the tokenizer of {base.model} has no chat template; use "
                        "prompt_format = 'plain' (prompt + base.prompt_separator) or a tokenizer that has one")
    model.generation_config = neutral_generation_settings(model, tokenizer)  # type: ignore[assignment]
    disable_dropout_in_model(model)  # STACK-NOTES: dropout makes policy and reference differ at step 0
    ref_copy = None
    if reference.mode == "copy":
        ref_copy = copy.deepcopy(model).eval().requires_grad_(False)
    lm = wrap_lora(model, lora)
    if base.precision == "bf16":
        for frozen in (lm, ref_copy):
            if frozen is not None:
                store_frozen_linear_in_bf16(frozen)
    config: Any = model.config
    head = ValueHead(int(getattr(config, "d_model", None) or config.hidden_size)).to(device)
    trainable = sum(p.numel() for p in lm.parameters() if p.requires_grad)
    total = sum(p.numel() for p in lm.parameters())
    encoder_frozen = not causal and not any(p.requires_grad for p in lm.get_encoder().parameters())
    return Policy(PolicyWithValue(lm, head, causal), tokenizer, ref_copy, trainable, total, encoder_frozen,
                  base.prompt_format, base.prompt_separator)


def save_adapter(policy: Policy, folder: Path) -> None:
    """peft's adapter format (safetensors) plus value_head.safetensors; written to a temp folder then renamed."""
    tmp = staging_folder(Path(folder))
    policy.lm.save_pretrained(str(tmp), safe_serialization=True)
    policy.tokenizer.save_pretrained(tmp)
    save_file({k: v.detach().cpu().contiguous() for k, v in policy.net.value_head.state_dict().items()},
              tmp / "value_head.safetensors")
    replace_folder(tmp, Path(folder))


def load_adapter_into(policy: Policy, folder: Path) -> None:
    set_peft_model_state_dict(policy.lm, load_file(Path(folder) / "adapter_model.safetensors"))
    policy.net.value_head.load_state_dict(load_file(Path(folder) / "value_head.safetensors"))


def export_merged(run_dir: str | Path, out: str | Path, overwrite: bool = False) -> Path:
    """Merge a run's adapter into its base and save a standalone Hugging Face model folder, built in a staging
    folder and swapped into place. Never writes into the run folder or the base model folder; refuses an
    existing file, and a non-empty folder unless overwrite is set (the folder is then replaced entirely)."""
    from alignrun.config import load_config

    run_dir, out = Path(run_dir), Path(out)
    adapter = run_dir / "adapter"
    if not (adapter / "adapter_config.json").is_file():
        raise UserError(f"{run_dir}: no adapter/ folder with adapter_config.json; is this a finished run folder?")
    cfg = load_config(run_dir / "config.toml")
    base = Path(cfg.base.model).expanduser()
    for folder, what in ((run_dir, "the run folder"), (base, "the base model folder the run was trained on")):
        if folder.exists() and (inside(out, folder) or inside(folder, out)):
            raise UserError(f"--merge {out}: {'is' if inside(out, folder) else 'holds'} {what} ({folder}); writing "
                            "there would replace it. Choose a new folder outside it")
    if out.exists() and not out.is_dir():
        raise UserError(f"--merge {out}: a file of that name exists; choose a new folder name")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        names = sorted(p.name for p in out.iterdir())
        shown = ", ".join(names[:5]) + (", ..." if len(names) > 5 else "")
        raise UserError(f"--merge {out}: the folder is not empty ({shown}); choose a new folder, or replace "
                        "it entirely with --overwrite")
    model, tokenizer = load_base(cfg.base, torch.device("cpu"))
    merged = PeftModel.from_pretrained(model, adapter).merge_and_unload()
    tmp = staging_folder(out)
    try:
        merged.save_pretrained(tmp, safe_serialization=True)
        tokenizer.save_pretrained(tmp)
        replace_folder(tmp, out)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise UserError(f"--merge {out}: could not write the merged model ({exc.strerror or exc}); nothing was "
                        "written there. Free disk space or fix the folder's permissions") from None
    print(f"merged model written to {out}")
    return out
