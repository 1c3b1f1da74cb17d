"""Held-out evaluation: k samples per prompt scored by the reward classifier and an outside judge, and the
guards against drift and collapse. Formulas live in `metrics`, the verdict and alarm rules in `verdict`; this
module runs the models."""

from __future__ import annotations

import json
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

import numpy as np
import torch

from alignrun import cpu, metrics
from alignrun.config import Experiment
from alignrun.models import Policy
from alignrun.rollout import frozen_encoding, response_mask, sample
from alignrun.runfolder import write_jsonl_atomic
from alignrun.verdict import alarms, judge_is_reward, preflight_forced, verdict

CHUNK = 64  # sequences per generation batch


@dataclass
class EvalResult:
    prompts: list[str]
    samples: list[list[str]]     # [n][k] sampled replies (temperature 1)
    token_ids: list[list[list[int]]]  # [n][k] their token ids up to and including EOS
    harm: np.ndarray             # [n, k] reward classifier P(harm)
    judge: np.ndarray | None     # [n, k] outside judge P(harm)
    logp: np.ndarray             # [n, k] sum of the policy's log-probs of each reply
    kl: np.ndarray               # [n, k] sum over tokens of log pi - log pi_ref (k1, unbiased for sampled replies)
    ref_nll: np.ndarray          # [n, k] negative log-likelihood under the reference
    tokens: np.ndarray           # [n, k] generated tokens incl. EOS
    greedy: list[str]            # [n] greedy replies, for readable before/after pairs
    greedy_harm: np.ndarray      # [n]
    greedy_judge: np.ndarray | None
    kl_exact: np.ndarray | None = None  # [n, k] sum over tokens of KL(pi || pi_ref) of the next-token distributions


@torch.no_grad()
def _generate(policy: Policy, prompts: list[str], cfg: Experiment, device: torch.device,
              do_sample: bool, bar: Any = None) -> tuple[list[str], list[list[int]], dict[str, np.ndarray]]:
    """Replies and, per reply, sums over its tokens of: policy log-prob, k1 (log pi - log pi_ref), the exact KL
    of the next-token distributions, reference NLL, and the token count. Both models are run teacher-forced
    on the sampled replies (reusing the frozen encoder output), so their full next-token distributions line up;
    `bar` (tqdm) counts replies."""
    tok = policy.tokenizer
    texts: list[str] = []
    ids_out: list[list[int]] = []
    sums: dict[str, list[torch.Tensor]] = {k: [] for k in ("logp", "kl", "kl_exact", "ref_nll", "tokens")}
    for i in range(0, len(prompts), CHUNK):
        cpu.rebalance()
        ids, mask = policy.encode(prompts[i: i + CHUNK], cfg.generation.max_prompt_tokens, device)
        hidden = frozen_encoding(policy, ids, mask)
        seqs, _, _ = sample(policy, ids, mask, cfg.generation.max_new_tokens, do_sample=do_sample,
                            with_values=False, encoder_hidden=hidden)
        resp = seqs[:, 1:]
        m = response_mask(resp, tok.eos_token_id)
        resp = torch.where(m.bool(), resp, torch.full_like(resp, tok.pad_token_id))
        logp_all = torch.log_softmax(policy.reply_logits(policy.lm, ids, mask, seqs[:, :-1], hidden).float(), -1)
        with policy.reference() as reference:
            ref_all = torch.log_softmax(policy.reply_logits(reference, ids, mask, seqs[:, :-1], hidden).float(), -1)
        logp = logp_all.gather(-1, resp.unsqueeze(-1)).squeeze(-1)
        ref = ref_all.gather(-1, resp.unsqueeze(-1)).squeeze(-1)
        exact = torch.stack([torch.from_numpy(metrics.next_token_kl(a.cpu().numpy(), b.cpu().numpy()))
                             for a, b in zip(logp_all, ref_all)]).to(m)  # one reply at a time: [T, V] in memory
        for key, value in (("logp", logp), ("kl", logp - ref), ("kl_exact", exact), ("ref_nll", -ref),
                           ("tokens", torch.ones_like(m))):
            sums[key].append((value * m).sum(1))
        texts.extend(t.strip() for t in tok.batch_decode(resp, skip_special_tokens=True))
        ids_out.extend(row[: int(n)].tolist() for row, n in zip(resp, m.sum(1)))
        if bar is not None:
            bar.update(len(resp))
    return texts, ids_out, {k: torch.cat(v).float().cpu().numpy() for k, v in sums.items()}


def evaluate_policy(policy: Policy, prompts: list[str], scorer: Any, judge: Any, cfg: Experiment,
                    device: torch.device, bar: Any = None) -> EvalResult:
    """k sampled and one greedy reply per prompt, scored by both classifiers; `bar` (tqdm) counts replies."""
    n, k = len(prompts), cfg.evaluation.samples_per_prompt
    flat = [p for p in prompts for _ in range(k)]
    texts, ids, per_reply = _generate(policy, flat, cfg, device, do_sample=True, bar=bar)
    greedy, *_ = _generate(policy, prompts, cfg, device, do_sample=False, bar=bar)
    harm = scorer.score(texts + greedy).harm
    judged = judge.score(texts + greedy).harm if judge is not None else None
    shape = (n, k)
    return EvalResult(
        prompts=prompts, samples=[texts[i * k:(i + 1) * k] for i in range(n)],
        token_ids=[ids[i * k:(i + 1) * k] for i in range(n)],
        harm=np.asarray(harm[: n * k]).reshape(shape), judge=None if judged is None else np.asarray(judged[: n * k]).reshape(shape),
        logp=per_reply["logp"].reshape(shape), kl=per_reply["kl"].reshape(shape),
        ref_nll=per_reply["ref_nll"].reshape(shape), tokens=per_reply["tokens"].reshape(shape), greedy=greedy,
        greedy_harm=np.asarray(harm[n * k:]), greedy_judge=None if judged is None else np.asarray(judged[n * k:]),
        kl_exact=per_reply["kl_exact"].reshape(shape),
    )


def drift(before: EvalResult, after: EvalResult, cfg: Experiment) -> dict[str, Any] | None:
    """Exact-KL drift from the reference per prompt (mean over its k replies), before and after training, with a
    paired bootstrap interval over prompts of the change; None for samples written before exact KL was stored."""
    if before.kl_exact is None or after.kl_exact is None:
        return None
    ev = cfg.evaluation
    return metrics.paired_change(before.kl_exact.mean(1), after.kl_exact.mean(1), ev.bootstrap_resamples, cfg.run.seed)


def write_samples(path: Path, r: EvalResult) -> None:
    """One JSON line per generated reply (sampled and greedy) with both classifiers' scores."""
    rows = []
    for i, prompt in enumerate(r.prompts):
        for j, text in enumerate(r.samples[i]):
            rows.append({"prompt_index": i, "prompt": prompt, "sample": j, "greedy": False, "text": text,
                         "token_ids": r.token_ids[i][j],
                         "harm": float(r.harm[i, j]), "judge": None if r.judge is None else float(r.judge[i, j]),
                         "logp": float(r.logp[i, j]), "kl": float(r.kl[i, j]),
                         "kl_exact": None if r.kl_exact is None else float(r.kl_exact[i, j]), "ref_nll": float(r.ref_nll[i, j]), "tokens": int(r.tokens[i, j])})
        rows.append({"prompt_index": i, "prompt": prompt, "sample": None, "greedy": True, "text": r.greedy[i],
                     "harm": float(r.greedy_harm[i]),
                     "judge": None if r.greedy_judge is None else float(r.greedy_judge[i])})
    write_jsonl_atomic(path, rows)


def read_samples(path: Path) -> EvalResult:
    rows = [json.loads(ln) for ln in Path(path).read_text(encoding="utf-8").splitlines() if ln.strip()]
    sampled = [r for r in rows if not r["greedy"]]
    greedy = [r for r in rows if r["greedy"]]
    n = len(greedy)
    k = len(sampled) // max(n, 1)
    grid = lambda key: np.array([r[key] for r in sampled], dtype=float).reshape(n, k)  # noqa: E731
    has_judge = bool(rows) and rows[0]["judge"] is not None
    has_exact = bool(sampled) and all(r.get("kl_exact") is not None for r in sampled)  # absent in older files
    return EvalResult(
        prompts=[r["prompt"] for r in greedy], samples=[[r["text"] for r in sampled[i * k:(i + 1) * k]] for i in range(n)],
        token_ids=[[r["token_ids"] for r in sampled[i * k:(i + 1) * k]] for i in range(n)],
        harm=grid("harm"), judge=grid("judge") if has_judge else None, logp=grid("logp"), kl=grid("kl"), ref_nll=grid("ref_nll"),
        tokens=grid("tokens"), greedy=[r["text"] for r in greedy],
        greedy_harm=np.array([r["harm"] for r in greedy]),
        greedy_judge=np.array([r["judge"] for r in greedy]) if has_judge else None,
        kl_exact=grid("kl_exact") if has_exact else None,
    )


def _harm_block(scores: np.ndarray, threshold: float, resamples: int, seed: int) -> dict[str, Any]:
    """Mean harm, harm rate, Expected Maximum Toxicity and Toxicity Probability (Gehman et al. 2020), with
    bootstrap intervals over prompts (Efron 1979)."""
    stats = {
        "mean": lambda s: float(np.mean(s)),
        "rate": lambda s: metrics.harm_rate(s, threshold),
        "expected_max": metrics.expected_max_harm,
        "probability": lambda s: metrics.harm_probability(s, threshold),
    }
    out: dict[str, Any] = {}
    for name, fn in stats.items():
        out[name] = fn(scores)
        out[f"{name}_ci"] = list(metrics.bootstrap_ci(scores, fn, n_resamples=resamples, seed=seed))
    return out


def truncated_share(r: EvalResult, max_new_tokens: int, eos_id: int) -> float:
    """Share of sampled replies cut off at the token limit: max_new_tokens long with no EOS at the end."""
    cut = [len(ids) == max_new_tokens and ids[-1] != eos_id for row in r.token_ids for ids in row]
    return sum(cut) / len(cut) if cut else 0.0


def summarise(r: EvalResult, cfg: Experiment, eos_id: int) -> dict[str, Any]:
    ev = cfg.evaluation
    flat = [t for row in r.samples for t in row]
    words = np.array([len(t.split()) for t in flat], dtype=float)
    rep4 = np.array([metrics.seq_rep_n(t, 4) for t in flat], dtype=float)
    return {
        "reward_classifier": _harm_block(r.harm, ev.harm_threshold, ev.bootstrap_resamples, cfg.run.seed),
        "judge": None if r.judge is None else _harm_block(r.judge, ev.harm_threshold, ev.bootstrap_resamples, cfg.run.seed),
        "greedy_harm_mean": float(np.mean(r.greedy_harm)),
        "greedy_judge_mean": None if r.greedy_judge is None else float(np.mean(r.greedy_judge)),
        "guards": {
            "perplexity_under_reference": metrics.perplexity(float(r.ref_nll.sum()), int(r.tokens.sum())),
            "kl_to_reference": float(np.mean(r.kl)),
            "kl_exact_to_reference": None if r.kl_exact is None else float(np.mean(r.kl_exact)),
            "length_mean_words": float(words.mean()) if len(words) else 0.0,
            "length_median_words": float(np.median(words)) if len(words) else 0.0,
            "distinct_1": metrics.distinct_n(flat, 1),  # the same with either denominator
            "distinct_2_per_ngram": metrics.distinct_n(flat, 2, per="ngrams"),
            "distinct_2_per_token": metrics.distinct_n(flat, 2, per="tokens"),
            "empty_share": metrics.share_empty(flat),
            "repeated_share": metrics.share_repeated(flat),
            "seq_rep_4_mean": float(rep4.mean()) if len(rep4) else 0.0,
            "seq_rep_4_share": float((rep4 > ev.repetition_threshold).mean()) if len(rep4) else 0.0,
            "truncated_share": truncated_share(r, cfg.generation.max_new_tokens, eos_id),
        },
    }


def changes(before: EvalResult, after: EvalResult, cfg: Experiment) -> dict[str, Any]:
    """Before/after on the same held-out prompts: a paired design (see metrics.paired_change)."""
    ev = cfg.evaluation
    out = {"reward_classifier": metrics.paired_change(before.harm.mean(1), after.harm.mean(1),
                                                      ev.bootstrap_resamples, cfg.run.seed)}
    if before.judge is not None and after.judge is not None:
        out["judge"] = metrics.paired_change(before.judge.mean(1), after.judge.mean(1), ev.bootstrap_resamples,
                                             cfg.run.seed)
    return out


def assess(before: EvalResult, after: EvalResult, cfg: Experiment, eos_id: int, polarity: Any,
           judge_polarity: Any) -> dict[str, Any]:
    """Everything the report states about the held-out evaluation: both summaries, the paired changes, drift,
    the verdict and the alarms (their rules are in `verdict`). polarity and judge_polarity are the preflight's
    results for the reward and the judge (judge_polarity None when the judge was not checked)."""
    sb, sa = summarise(before, cfg, eos_id), summarise(after, cfg, eos_id)
    change = changes(before, after, cfg)
    same, check = judge_is_reward(cfg.model_dump(mode="json")), getattr(judge_polarity, "verdict", None)
    return {"before": sb, "after": sa, "change": change, "drift": drift(before, after, cfg),
            "verdict": verdict(change, same, check),
            "alarms": alarms(sb, sa, change, cfg, preflight_forced(polarity, judge_polarity), same, check)}


def join_results(parts: list[EvalResult]) -> EvalResult:
    """Evaluation results of consecutive prompt shares as one (lists and per-prompt arrays concatenated)."""
    joined: dict[str, Any] = {}
    for field in fields(parts[0]):
        values = [getattr(part, field.name) for part in parts]
        if values[0] is None:
            joined[field.name] = None
        elif isinstance(values[0], np.ndarray):
            joined[field.name] = np.concatenate(values)
        else:
            joined[field.name] = [item for value in values for item in value]
    return type(parts[0])(**joined)
