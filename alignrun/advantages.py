"""Critic-free advantages: each prompt's k replies are one group, and the group itself is the baseline.

Shapes: `rewards` is [G, k], G prompts with k sequence rewards each (replies of one prompt are adjacent in a step).
The result is one advantage per reply, given to every one of its tokens (`per_token`).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor

# A group whose rewards spread less than this has no signal: its group-relative advantages are 0, not noise
# divided by noise (common practice).
STD_FLOOR = 1e-6


def leave_one_out(rewards: Tensor) -> Tensor:
    """[G, k] -> [G, k]: each reward minus the mean of the other k - 1 rewards of its group."""
    k = rewards.shape[1]
    others = (rewards.sum(dim=1, keepdim=True) - rewards) / (k - 1)
    return rewards - others  # A_i = R_i - 1/(k-1) sum_{j != i} R_j (Kool et al. 2019; Ahmadian et al. 2024)


def group_relative(rewards: Tensor, std: str = "sample") -> Tensor:
    """[G, k] -> [G, k]: (R - group mean) / group std; std "sample" (n - 1), "population" (n) or "none" (no division)."""
    centred = rewards - rewards.mean(dim=1, keepdim=True)
    if std == "none":
        return centred  # A_i = R_i - mean(R), no std division (Liu et al. 2025)
    spread = rewards.std(dim=1, keepdim=True, correction=1 if std == "sample" else 0)
    scaled = centred / spread.clamp(min=STD_FLOOR)  # A_i = (R_i - mean(R)) / std(R) (Shao et al. 2024)
    return torch.where(spread > STD_FLOOR, scaled, torch.zeros_like(scaled))


def per_token(advantages: Tensor, mask: Tensor) -> Tensor:
    """[B] one advantage per reply -> [B, T] the same value on each of its real tokens, 0 on padding."""
    return advantages.to(mask.dtype).unsqueeze(1) * mask


def describe(method: Any, ppo: Any) -> dict[str, Any]:
    """The method in effect, for report.json (`method`, `ppo`: the config sections)."""
    name, k = method.name, method.samples_per_prompt
    advantage = {
        "ppo": "GAE from the value head (Schulman et al. 2016)"
               + (", whitened over the step's tokens" if ppo.whiten_advantages else ""),
        "rloo": "leave-one-out: each reply's reward minus the mean of the other k - 1 replies to its prompt "
                "(Kool et al. 2019; Ahmadian et al. 2024)",
        "grpo": {"sample": "group-relative: (R - group mean) / group sample std (n - 1) (Shao et al. 2024)",
                 "population": "group-relative: (R - group mean) / group population std (n) (Shao et al. 2024)",
                 "none": "group-relative without std division: R - group mean (Liu et al. 2025)"}[method.group_std],
    }[name]
    in_loss = name == "grpo"
    return {
        "name": name, "samples_per_prompt": k, "advantage": advantage,
        "group_std": method.group_std if name == "grpo" else None,
        "loss_average": method.loss_average,
        "kl_placement": "loss" if in_loss else "reward",
        "kl_term": ("beta * k3 per token, averaged like the policy loss (Shao et al. 2024)" if in_loss else
                    "-beta * k1 per token in the reward" if name == "ppo" else
                    "-beta * sum of k1 over the reply, subtracted from its reward before the baseline"),
        "beta_scales": "the k3 loss term" if in_loss else "the KL penalty in the reward",
        "value_head": "trained (value loss)" if name == "ppo" else
                      "not trained (adapter/value_head.safetensors keeps its initial weights)",
    }
