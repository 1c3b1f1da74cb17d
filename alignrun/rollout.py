"""Rollout: sample replies from the policy and keep the log-prob bookkeeping PPO needs.

Old log-probs and old values come from the generation pass itself (its raw logits and decoder hidden
states), which equals a teacher-forced forward within 1e-6 in eval mode (STACK-NOTES), so no second policy
forward is paid. Reference log-probs come from one batched no-grad pass with the adapters disabled. When the
encoder has no adapter (lora.scope = "decoder") its output is computed once and kept for the PPO epochs.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from transformers import PreTrainedTokenizerBase
from trl.trainer.utils import selective_log_softmax

from alignrun.models import Policy, encoder_outputs


@dataclass
class Rollout:
    prompt_ids: torch.Tensor       # [B, P]
    prompt_mask: torch.Tensor      # [B, P]
    decoder_input: torch.Tensor    # [B, T] start token + response[:-1]
    response_ids: torch.Tensor     # [B, T] padded after EOS
    response_mask: torch.Tensor    # [B, T] float, 1 on real tokens including EOS
    logp: torch.Tensor             # [B, T] policy log-probs at sampling time
    ref_logp: torch.Tensor         # [B, T] reference log-probs
    values: torch.Tensor           # [B, T] value estimates at sampling time
    texts: list[str]
    encoder_hidden: torch.Tensor | None = None  # [B, P, H] the frozen encoder's output, when it has no adapter

    def select(self, idx: torch.Tensor) -> Rollout:
        picked = {f: getattr(self, f)[idx] for f in _TENSORS}
        hidden = None if self.encoder_hidden is None else self.encoder_hidden[idx]
        return Rollout(**picked, texts=[self.texts[i] for i in idx.tolist()], encoder_hidden=hidden)


_TENSORS = ("prompt_ids", "prompt_mask", "decoder_input", "response_ids", "response_mask", "logp", "ref_logp", "values")


def encode_prompts(tokenizer: PreTrainedTokenizerBase, prompts: list[str], max_tokens: int,
                   device: torch.device) -> tuple[torch.Tensor, torch.Tensor]:
    enc = tokenizer(prompts, return_tensors="pt", padding=True, truncation=True, max_length=max_tokens)
    return enc["input_ids"].to(device), enc["attention_mask"].to(device)


def response_mask(response_ids: torch.Tensor, eos_id: int) -> torch.Tensor:
    """1 up to and including the first EOS, 0 after it (padding); all 1 when no EOS was sampled."""
    is_eos = (response_ids == eos_id).int()
    after_eos = (torch.cumsum(is_eos, dim=1) - is_eos) > 0
    return (~after_eos).float()


def decoder_start(policy: Policy) -> int:
    start = policy.lm.config.decoder_start_token_id
    return int(start if start is not None else policy.tokenizer.pad_token_id)


@torch.no_grad()
def frozen_encoding(policy: Policy, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor) -> torch.Tensor | None:
    """The encoder's output when no adapter sits in it (lora.scope = "decoder"): the same for the policy, the
    reference and every PPO epoch, so it is computed once. None when the encoder is being trained."""
    if not policy.encoder_frozen:
        return None
    return policy.lm.get_encoder()(input_ids=prompt_ids, attention_mask=prompt_mask).last_hidden_state


@torch.no_grad()
def sample(policy: Policy, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor, max_new_tokens: int,
           do_sample: bool = True, with_values: bool = True, encoder_hidden: torch.Tensor | None = None,
           ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor | None]:
    """Sample at temperature 1 with no top-k/top-p, so the stored log-probs are the policy's own."""
    sampling = {"do_sample": True, "temperature": 1.0, "top_k": 0, "top_p": 1.0} if do_sample else {"do_sample": False}
    reuse = {} if encoder_hidden is None else {"encoder_outputs": encoder_outputs(encoder_hidden)}
    out = policy.lm.generate(
        input_ids=prompt_ids, attention_mask=prompt_mask, max_new_tokens=max_new_tokens, num_beams=1, **sampling,
        **reuse,
        output_logits=True, output_hidden_states=with_values, return_dict_in_generate=True,
        pad_token_id=policy.tokenizer.pad_token_id, eos_token_id=policy.tokenizer.eos_token_id,
    )
    sequences = out.sequences  # [B, 1 + T], starting with the decoder start token
    logits = torch.stack(out.logits, dim=1).float()  # [B, T, V] raw logits at each sampled position
    response = sequences[:, 1:]
    logp = selective_log_softmax(logits, response)
    values = None
    if with_values:
        hidden = torch.cat([step[-1] for step in out.decoder_hidden_states], dim=1)  # [B, T, H] last layer
        values = policy.net.value_head(hidden).float()
    return sequences, logp, values


@torch.no_grad()
def reference_logprobs(policy: Policy, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor,
                       decoder_input: torch.Tensor, response_ids: torch.Tensor,
                       encoder_hidden: torch.Tensor | None = None) -> torch.Tensor:
    with policy.reference() as ref:
        logits = ref(input_ids=prompt_ids, attention_mask=prompt_mask, decoder_input_ids=decoder_input,
                     encoder_outputs=encoder_outputs(encoder_hidden), use_cache=False).logits
    return selective_log_softmax(logits.float(), response_ids)


def rollout(policy: Policy, prompts: list[str], max_prompt_tokens: int, max_new_tokens: int,
            device: torch.device) -> Rollout:
    tok = policy.tokenizer
    prompt_ids, prompt_mask = encode_prompts(tok, prompts, max_prompt_tokens, device)
    hidden = frozen_encoding(policy, prompt_ids, prompt_mask)
    sequences, logp, values = sample(policy, prompt_ids, prompt_mask, max_new_tokens, encoder_hidden=hidden)
    assert values is not None
    response = sequences[:, 1:]
    mask = response_mask(response, tok.eos_token_id)
    response = torch.where(mask.bool(), response, torch.full_like(response, tok.pad_token_id))
    decoder_input = sequences[:, :-1]
    ref_logp = reference_logprobs(policy, prompt_ids, prompt_mask, decoder_input, response, hidden)
    texts = tok.batch_decode(response, skip_special_tokens=True)
    return Rollout(prompt_ids, prompt_mask, decoder_input, response, mask, logp * mask, ref_logp * mask,
                   values * mask, [t.strip() for t in texts], hidden)
