"""Rollout: sample replies from the policy and keep the log-prob bookkeeping PPO needs.

Old log-probs and old values come from the generation pass itself (its raw logits and decoder hidden
states), which equals a teacher-forced forward within 1e-6 in eval mode (STACK-NOTES), so no second policy
forward is paid. Reference log-probs come from one batched no-grad pass with the adapters disabled. When the
encoder has no adapter (lora.scope = "decoder") its output is computed once and kept for the PPO epochs.
Encoder-decoder and decoder-only bases differ only inside `models.Policy` (see models' docstring).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from transformers import GenerationConfig, PreTrainedTokenizerBase, StoppingCriteria, StoppingCriteriaList
from trl.trainer.utils import selective_log_softmax

from alignrun import cpu
from alignrun.errors import UserError
from alignrun.models import Policy, decoder_states, encoder_outputs


@dataclass
class Rollout:
    prompt_ids: torch.Tensor       # [B, P] (causal: left-padded)
    prompt_mask: torch.Tensor      # [B, P]
    decoder_input: torch.Tensor    # [B, T] start token (causal: the prompt's last token) + response[:-1]
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
    """Prompts as they are, with the tokenizer's special tokens (a seq2seq encoder's input); `Policy.encode` also
    formats a causal model's prompts."""
    enc = tokenizer(prompts, return_tensors="pt", padding=True, truncation=True, max_length=max_tokens)
    return enc["input_ids"].to(device), enc["attention_mask"].to(device)


def response_mask(response_ids: torch.Tensor, eos_id: int) -> torch.Tensor:
    """1 up to and including the first EOS, 0 after it (padding); all 1 when no EOS was sampled."""
    is_eos = (response_ids == eos_id).int()
    after_eos = (torch.cumsum(is_eos, dim=1) - is_eos) > 0
    return (~after_eos).float()


def decoder_start(policy: Policy) -> int | None:
    """The decoder start token (models.neutral_generation_settings kept it from the saved settings or config);
    None for a decoder-only model, which continues the prompt."""
    return None if policy.causal else int(policy.lm.generation_config.decoder_start_token_id)


@torch.no_grad()
def frozen_encoding(policy: Policy, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor) -> torch.Tensor | None:
    """The encoder's output when no adapter sits in it (lora.scope = "decoder"): the same for the policy, the
    reference and every PPO epoch, so it is computed once. None when the encoder is being trained."""
    if not policy.encoder_frozen:
        return None
    return policy.lm.get_encoder()(input_ids=prompt_ids, attention_mask=prompt_mask).last_hidden_state


def generation_settings(policy: Policy, max_new_tokens: int, do_sample: bool) -> GenerationConfig:
    """The whole generation configuration of training and evaluation: temperature 1, no top-k/top-p, no
    processors (the model's saved settings were replaced by models.neutral_generation_settings), greedy when not
    sampling. Raw and processed scores are both returned so `sample` can check that they agree."""
    sampling = {"do_sample": True, "temperature": 1.0, "top_k": 0, "top_p": 1.0} if do_sample else {"do_sample": False}
    return GenerationConfig(
        **sampling, num_beams=1, max_new_tokens=max_new_tokens, eos_token_id=policy.tokenizer.eos_token_id,
        pad_token_id=policy.tokenizer.pad_token_id, decoder_start_token_id=decoder_start(policy),
        output_logits=True, output_scores=True, return_dict_in_generate=True,
    )


class _Rebalance(StoppingCriteria):
    """Never stops generation: between tokens it lets cpu.rebalance adjust the thread count, so a long sampling
    pass reacts to other programs within a fraction of a second rather than at the next step."""

    def __call__(self, input_ids: torch.Tensor, scores: torch.Tensor, **kwargs: object) -> torch.Tensor:
        cpu.rebalance()
        return torch.zeros(input_ids.shape[0], dtype=torch.bool, device=input_ids.device)


@torch.no_grad()
def sample(policy: Policy, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor, max_new_tokens: int,
           do_sample: bool = True, with_values: bool = True, encoder_hidden: torch.Tensor | None = None,
           ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor | None]:
    """Sample at temperature 1 from the raw distribution (or take its argmax), so the stored log-probs are those
    of the distribution the tokens were drawn from (Huang et al. 2024, sampling details; from memory).

    Returns (sequences [B, 1 + T] starting with the decoder start token (causal: the prompt's last token), log-probs
    [B, T], values [B, T] or None). Raises UserError when generation changed the distribution (a logits processor
    was active)."""
    reuse = {} if encoder_hidden is None else {"encoder_outputs": encoder_outputs(encoder_hidden)}
    limit = getattr(policy.lm.config, "n_positions", None)  # learned positions (GPT-2): no position past it exists
    if policy.causal and limit is not None and prompt_ids.shape[1] + max_new_tokens > limit:
        raise UserError(f"generation: a prompt of {prompt_ids.shape[1]} tokens plus generation.max_new_tokens = "
                        f"{max_new_tokens} exceeds the {limit} positions of {policy.lm.config.name_or_path}; lower "
                        "generation.max_prompt_tokens or generation.max_new_tokens")
    with decoder_states(policy.lm) as states:
        out = policy.lm.generate(input_ids=prompt_ids, attention_mask=prompt_mask,
                                 generation_config=generation_settings(policy, max_new_tokens, do_sample),
                                 stopping_criteria=StoppingCriteriaList([_Rebalance()]), **reuse)
    if not all(raw is used or torch.equal(raw, used) for raw, used in zip(out.logits, out.scores, strict=True)):
        raise UserError(f"base.model: generating with {policy.lm.config.name_or_path} changed the model's "
                        "distribution (a logits processor was active), so the stored log-probs would not be those of "
                        "the sampled tokens; alignrun needs a model whose generate() honours its generation_config")
    # [B, 1 + T]: a causal model's output repeats the prompt; its last token is where the reply starts
    sequences = out.sequences[:, prompt_ids.shape[1] - 1:] if policy.causal else out.sequences
    # log-softmax at the sampled token, z_a - logsumexp(z), step by step from the raw logits: no [B, T, V] copy
    steps = (step.float() for step in out.logits)
    logp = torch.stack([z.gather(1, token[:, None]).squeeze(1) - torch.logsumexp(z, dim=-1)
                        for z, token in zip(steps, sequences[:, 1:].T, strict=True)], dim=1)
    values = None
    if with_values:
        # [B, T, H] the decoder's last layer step by step (a causal model's first step covers the whole prompt)
        hidden = torch.cat([states[0][:, -1:], *states[1: len(out.logits)]], dim=1)
        values = policy.net.value_head(hidden).float()
    return sequences, logp, values


@torch.no_grad()
def reference_logprobs(policy: Policy, prompt_ids: torch.Tensor, prompt_mask: torch.Tensor,
                       decoder_input: torch.Tensor, response_ids: torch.Tensor,
                       encoder_hidden: torch.Tensor | None = None) -> torch.Tensor:
    with policy.reference() as ref:
        logits = policy.reply_logits(ref, prompt_ids, prompt_mask, decoder_input, encoder_hidden)
    return selective_log_softmax(logits.float(), response_ids)


def rollout(policy: Policy, prompts: list[str], max_prompt_tokens: int, max_new_tokens: int,
            device: torch.device) -> Rollout:
    """Sample one reply per prompt with its bookkeeping.

    A reply that reaches `max_new_tokens` without EOS is kept as it stands: it is scored like any other and
    treated as ended, its last token getting the score and the value after it taken as 0 (ppo.gae), rather than
    bootstrapped from the value of a continuation that was never sampled. The trainer logs the share of such
    replies (metrics.jsonl `truncated_share`); a high share means max_new_tokens cuts replies short.
    """
    tok = policy.tokenizer
    prompt_ids, prompt_mask = policy.encode(prompts, max_prompt_tokens, device)
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
