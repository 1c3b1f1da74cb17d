"""Pure tensor functions of the PPO update: KL estimators, penalised rewards, GAE, whitening, losses.

Shapes: B sequences, T generated tokens. `mask` is [B, T], 1 on real generated tokens (EOS included)
and 0 on the padding after them. Every reduction is over real tokens only; a row whose mask is all
zero (an empty generation) contributes nothing and never produces NaN.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict, dataclass

import torch
import torch.nn.functional as F
from torch import Tensor


def masked_mean(x: Tensor, mask: Tensor, dim: int | None = None) -> Tensor:
    """Mean of `x` over entries where `mask` is set; 0 where there are none (no NaN)."""
    keep = mask.bool()
    kept = torch.where(keep, x, torch.zeros_like(x))
    if dim is None:
        return kept.sum() / keep.sum().clamp(min=1)
    return kept.sum(dim) / keep.sum(dim).clamp(min=1)


def masked_var(x: Tensor, mask: Tensor, unbiased: bool = True) -> Tensor:
    """Variance of `x` over the masked entries; 0 when there are too few of them (<1, or <2 if unbiased)."""
    centred = x - masked_mean(x, mask)
    var = masked_mean(centred**2, mask)
    if unbiased:
        count = mask.bool().sum().to(var.dtype)
        # Bessel's correction n / (n - 1) (common practice)
        var = torch.where(count > 1, var * count / (count - 1).clamp(min=1), torch.zeros_like(var))
    return var


def moments(x: Tensor, mask: Tensor, total: Callable[[Tensor], Tensor] = lambda t: t) -> tuple[Tensor, Tensor]:
    """Mean and unbiased variance of the masked entries; `total` sums a tensor over processes, so that with several
    processes they are those of the whole batch. Variance 0 when there are fewer than 2 entries."""
    keep = mask.bool()
    count = total(keep.sum().to(x.dtype))
    mean = total(torch.where(keep, x, torch.zeros_like(x)).sum()) / count.clamp(min=1)
    squares = total(torch.where(keep, (x - mean) ** 2, torch.zeros_like(x)).sum())
    # Bessel's correction: divide by n - 1 (common practice)
    return mean, torch.where(count > 1, squares / (count - 1).clamp(min=1), torch.zeros_like(squares))


def whiten(x: Tensor, mask: Tensor, shift_mean: bool = True,
           total: Callable[[Tensor], Tensor] = lambda t: t) -> Tensor:
    """Normalise to mean 0 / variance 1 over the masked entries of the whole batch (`total`: see moments); 0 on
    padding."""
    mean, var = moments(x, mask, total)
    whitened = (x - mean) * torch.rsqrt(var + 1e-8)  # per-batch advantage whitening (Huang et al. 2022)
    if not shift_mean:
        whitened = whitened + mean
    return torch.where(mask.bool(), whitened, torch.zeros_like(whitened))


def masked_average(x: Tensor, mask: Tensor, average: str = "tokens") -> Tensor:
    """The loss reduction: the mean over every real token ("tokens"), or each reply's mean over its tokens, then the
    mean over replies that have any ("replies": 1/G sum_i 1/|o_i| sum_t, Shao et al. 2024, eq. 3)."""
    if average == "tokens":
        return masked_mean(x, mask)
    has_tokens = mask.bool().any(dim=1)
    return masked_mean(x, mask, dim=1).sum() / has_tokens.sum().clamp(min=1)


def kl_k1(logp: Tensor, ref_logp: Tensor) -> Tensor:
    """Per-token k1 = log pi - log pi_ref: unbiased for KL(pi || pi_ref) under samples from pi."""
    return logp - ref_logp  # k1 = -log r, r = pi_ref/pi (Schulman 2020, "Approximating KL Divergence")


def kl_k2(logp: Tensor, ref_logp: Tensor) -> Tensor:
    """Per-token k2 = 0.5 (log r)^2: biased, low variance, never negative."""
    return 0.5 * (ref_logp - logp) ** 2  # k2 = (log r)^2 / 2 (Schulman 2020)


def kl_k3(logp: Tensor, ref_logp: Tensor) -> Tensor:
    """Per-token k3 = (r - 1) - log r: unbiased for KL(pi || pi_ref) under samples from pi, never negative."""
    log_r = ref_logp - logp
    return torch.expm1(log_r) - log_r  # k3 = (r - 1) - log r (Schulman 2020); expm1 keeps small values >= 0


def _last_token_onehot(mask: Tensor) -> Tensor:
    """[B, T] one-hot of each row's last real token; an all-zero row stays all zero."""
    keep = mask.bool()
    positions = torch.arange(mask.shape[1], device=mask.device).expand_as(mask)
    last = torch.where(keep, positions, torch.zeros_like(positions)).amax(dim=1)
    return F.one_hot(last, mask.shape[1]) * keep.any(dim=1, keepdim=True)


def penalised_rewards(
    score: Tensor, logp: Tensor, ref_logp: Tensor, mask: Tensor, beta: float
) -> tuple[Tensor, Tensor]:
    """Per-token rewards: -beta * k1 on every real token, plus the sequence `score` [B] on the last one.

    Returns (rewards [B, T], k1 KL [B, T]), both zero on padding. A row with no real token gets no score.
    """
    keep = mask.bool()
    kl = torch.where(keep, kl_k1(logp, ref_logp), torch.zeros_like(logp))
    # r_t = -beta (log pi - log pi_ref) + [t = last] R(x, y) (Ziegler et al. 2019; Stiennon et al. 2020)
    rewards = -beta * kl + _last_token_onehot(mask).to(kl.dtype) * score.to(kl.dtype).unsqueeze(1)
    return rewards, kl


def gae(rewards: Tensor, values: Tensor, mask: Tensor, gamma: float, lam: float) -> tuple[Tensor, Tensor]:
    """Generalised advantage estimates; the value after the last real token is 0 (the episode ends).

    Returns (advantages, returns = advantages + values), both zero on padding.
    """
    keep = mask.bool()
    zeros = torch.zeros_like(values)
    r = torch.where(keep, rewards, zeros)
    v = torch.where(keep, values, zeros)
    next_v = torch.cat([v[:, 1:], zeros[:, :1]], dim=1)
    deltas = r + gamma * next_v - v  # delta_t = r_t + gamma V_{t+1} - V_t (Schulman et al. 2016)
    advantages = []
    running = zeros[:, 0]
    for t in reversed(range(values.shape[1])):
        # A_t = delta_t + gamma lam A_{t+1}, i.e. sum_l (gamma lam)^l delta_{t+l} (Schulman et al. 2016)
        running = deltas[:, t] + gamma * lam * running
        advantages.append(running)
    adv = torch.where(keep, torch.stack(advantages[::-1], dim=1), zeros)
    return adv, torch.where(keep, adv + values, zeros)


def policy_loss(
    logp_new: Tensor, logp_old: Tensor, advantages: Tensor, mask: Tensor, clip_eps: float, average: str = "tokens"
) -> tuple[Tensor, Tensor, Tensor]:
    """Clipped surrogate loss to minimise (reduced by `masked_average`), clip fraction, and approximate KL(old || new).

    The clip fraction is the share of real tokens where the clipped term is the one in effect
    (its gradient is cut); approx KL is the masked mean of k3 with samples from the old policy.
    The last two are detached statistics.
    """
    # padding gets ratio 1 so that whatever log-probs it holds cannot reach the gradient as NaN/inf
    log_ratio = torch.where(mask.bool(), logp_new - logp_old, torch.zeros_like(logp_new))
    ratio = torch.exp(log_ratio)
    unclipped = ratio * advantages
    clipped = torch.clamp(ratio, 1.0 - clip_eps, 1.0 + clip_eps) * advantages
    # L = E[min(rho A, clip(rho, 1-eps, 1+eps) A)], minimised as -L (Schulman et al. 2017, eq. 7)
    loss = -masked_average(torch.minimum(unclipped, clipped), mask, average)
    with torch.no_grad():
        # share of tokens where the clipped term wins (common practice, e.g. Huang et al. 2024; from memory)
        clip_frac = masked_mean((clipped < unclipped).to(ratio.dtype), mask)
        approx_kl = masked_mean(kl_k3(logp_old, logp_new), mask)  # k3 of KL(old || new) (Schulman 2020)
    return loss, clip_frac, approx_kl


def kl_loss(logp_new: Tensor, ref_logp: Tensor, mask: Tensor, average: str = "tokens") -> Tensor:
    """The KL to the reference as a loss term: k3 per token under samples from the policy, reduced by
    `masked_average` (Shao et al. 2024, eq. 4; the caller multiplies by beta)."""
    # padding gets log r = 0, so k3 = 0 there and nothing from it reaches the gradient
    keep = mask.bool()
    return masked_average(kl_k3(torch.where(keep, logp_new, ref_logp), ref_logp), mask, average)


def value_loss(
    values_new: Tensor, values_old: Tensor, returns: Tensor, mask: Tensor, clip: float | None, average: str = "tokens"
) -> tuple[Tensor, Tensor]:
    """Value loss (reduced by `masked_average`), clipped when `clip` is set, and the share of real tokens where the
    clipped term is the larger one."""
    unclipped = (values_new - returns) ** 2
    if clip is None:
        return 0.5 * masked_average(unclipped, mask, average), torch.zeros((), dtype=values_new.dtype)  # 0.5 E[(V - R)^2]
    values_clipped = values_old + torch.clamp(values_new - values_old, -clip, clip)
    clipped = (values_clipped - returns) ** 2
    # 0.5 * E[max((V - R)^2, (V_clip - R)^2)] (Huang et al. 2022, value loss clipping)
    loss = 0.5 * masked_average(torch.maximum(unclipped, clipped), mask, average)
    with torch.no_grad():
        # share of tokens where the clipped term wins (common practice, e.g. Huang et al. 2024; from memory)
        clip_frac = masked_mean((clipped > unclipped).to(values_new.dtype), mask)
    return loss, clip_frac


@dataclass
class KLController:
    """The KL coefficient beta: fixed when `target` is None, otherwise adapted towards `target` once per step.

    With `horizon` = 0 the step's error moves beta by the gain K_beta (Ziegler et al. 2019, §2.2), so the speed per
    reply depends on how many replies a step holds; with `horizon` = H > 0 it moves by n / H for a step of n replies
    (the paper's released code, from memory), the same speed per reply whatever the step size."""

    beta: float
    target: float | None = None
    gain: float = 0.1
    horizon: int = 0

    def update(self, observed_kl: float, episodes: int = 1) -> float:
        """Adapt beta to the observed KL per reply (summed over its tokens) after a step of `episodes` replies."""
        if self.target is None:
            return self.beta
        if not math.isfinite(observed_kl):
            raise ValueError(f"observed KL must be a finite number, got {observed_kl}")
        # e = clip(KL / target - 1, -0.2, 0.2) (Ziegler et al. 2019, §2.2)
        error = min(max(observed_kl / self.target - 1.0, -0.2), 0.2)
        if self.horizon:
            self.beta *= 1.0 + error * episodes / self.horizon  # beta <- beta (1 + e n / H) (Ziegler et al. 2019, code)
        else:
            self.beta *= 1.0 + self.gain * error  # beta <- beta (1 + K_beta e) (Ziegler et al. 2019, §2.2)
        return self.beta

    def rule(self) -> str:
        """The update rule in effect, in words (for the report)."""
        if self.target is None:
            return f"fixed beta = {self.beta:g} (no kl.target)"
        error = f"e = clip(KL / {self.target:g} - 1, -0.2, 0.2) with KL the mean over replies of the summed k1"
        if self.horizon:
            return f"beta <- beta * (1 + e * n / {self.horizon}), n = replies in the step; {error} (Ziegler et al. 2019)"
        return f"beta <- beta * (1 + {self.gain:g} * e) once per step; {error} (Ziegler et al. 2019)"

    def state_dict(self) -> dict:
        return asdict(self)

    def load_state_dict(self, d: dict) -> None:
        self.beta, self.gain, self.horizon = float(d["beta"]), float(d["gain"]), int(d.get("horizon", 0))
        self.target = None if d["target"] is None else float(d["target"])
