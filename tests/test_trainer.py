"""The policy-optimisation loop on tiny T5 and BART models built in the test session (never downloaded)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch
from peft import PeftModel
from transformers import (
    AutoModelForSeq2SeqLM,
    BertConfig,
    BertForSequenceClassification,
    T5Config,
    T5ForConditionalGeneration,
)

from alignrun.config import BaseSection, LoraSection, ReferenceSection, load_config
from alignrun.errors import UserError
from alignrun.models import build_policy, lora_targets, wrap_lora
from alignrun.rollout import Rollout, response_mask, rollout
from alignrun.trainer import run_experiment, step_prompts
from tests import token_reward

CPU = torch.device("cpu")


def _write_config(folder: Path, model: Path, prompts: list[str], **sections: dict) -> Path:
    (folder / "prompts.jsonl").write_text("".join(json.dumps({"prompt": p}) + "\n" for p in prompts))
    body = {
        "base": {"model": str(model)},
        "lora": {"rank": 4, "alpha": 8.0},
        "reward": {"backend": "callable", "source": "tests.token_reward:harm"},
        "kl": {"coef": 0.01},
        "ppo": {"steps": 2, "prompts_per_step": 8, "minibatch": 4, "epochs": 2, "learning_rate": 5e-3},
        "generation": {"max_new_tokens": 8, "max_prompt_tokens": 32},
        "data": {"prompts": "prompts.jsonl", "heldout_share": 0.25},
        "evaluation": {"samples_per_prompt": 2, "max_prompts": 4, "bootstrap_resamples": 100},
    }
    for name, values in sections.items():
        body[name] = {**body.get(name, {}), **values}
    import tomli_w

    path = folder / "experiment.toml"
    path.write_text(tomli_w.dumps(body))
    return path


def _perturb_lora_b(policy) -> None:
    """LoRA's B starts at zero (Hu et al. 2021), where policy and base agree whatever the code does: give B values."""
    with torch.no_grad():
        for name, p in policy.lm.named_parameters():
            if "lora_B" in name:
                p.normal_(std=0.2, generator=torch.Generator().manual_seed(len(name)))


PROMPTS = [f"Customer {i}: my order number {i * 7} has not arrived at the {['north', 'south', 'east'][i % 3]} depot."
           for i in range(40)]


def test_lora_trainable_count_matches_hu_et_al_worked_example() -> None:
    # Hu et al. 2021: r * (d_in + d_out) per adapted matrix; REFERENCES.md worked example: a T5-small-shaped
    # model with LoRA r=8 on q and v of all 36 attention blocks -> 36 * 8 * 1024 = 294,912 parameters.
    cfg = T5Config(d_model=512, d_kv=64, num_heads=8, d_ff=2048, num_layers=6, num_decoder_layers=6, vocab_size=32128)
    with torch.device("meta"):
        model = T5ForConditionalGeneration(cfg)
    assert lora_targets(model, "auto") == ["q", "v"]
    lm = wrap_lora(model, LoraSection(rank=8, scope="encoder-decoder"))
    trainable = sum(p.numel() for p in lm.parameters() if p.requires_grad)
    assert trainable == 36 * 8 * (512 + 512) == 294_912


def _teacher_forced_logp(model, ro) -> torch.Tensor:
    with torch.no_grad():
        logits = model(input_ids=ro.prompt_ids, attention_mask=ro.prompt_mask, decoder_input_ids=ro.decoder_input).logits
    return torch.log_softmax(logits.float(), -1).gather(-1, ro.response_ids.unsqueeze(-1)).squeeze(-1) * ro.response_mask


@pytest.mark.parametrize("mode", ["adapters-off", "copy"])
@pytest.mark.parametrize("arch", ["t5", "bart"])
def test_reference_is_the_base_and_stored_logprobs_are_the_policys(tiny_models, arch, mode) -> None:
    torch.manual_seed(0)
    policy = build_policy(BaseSection(model=str(tiny_models[arch])), LoraSection(rank=4), ReferenceSection(mode=mode),
                          CPU)
    ro = rollout(policy, PROMPTS[:6], 32, 10, CPU)
    # LoRA's B starts at zero (Hu et al. 2021): at step 0 policy and reference agree to float rounding
    assert torch.allclose(ro.logp, ro.ref_logp, atol=1e-5)
    # Beyond step 0 they must not: with B perturbed, the reference is still a freshly loaded base
    _perturb_lora_b(policy)
    torch.manual_seed(1)
    ro = rollout(policy, PROMPTS[:6], 32, 10, CPU)
    base = AutoModelForSeq2SeqLM.from_pretrained(tiny_models[arch]).eval()
    from_base = _teacher_forced_logp(base, ro)
    assert (ro.logp - from_base).abs().max() > 1e-2  # the adapters change the policy (the check has teeth)
    assert torch.allclose(ro.ref_logp, from_base, atol=1e-5)
    with policy.reference() as ref:
        assert torch.allclose(_teacher_forced_logp(ref, ro), from_base, atol=1e-5)
    # old log-probs and values from the generation pass equal a teacher-forced policy forward (STACK-NOTES: 1e-6)
    assert torch.allclose(_teacher_forced_logp(policy.lm, ro), ro.logp, atol=1e-5)
    with torch.no_grad():
        _, values = policy.net(ro.prompt_ids, ro.prompt_mask, ro.decoder_input)
    assert torch.allclose(values * ro.response_mask, ro.values, atol=1e-5)


def test_response_mask_keeps_the_first_eos_and_drops_what_follows() -> None:
    # The end-of-sequence token is the reply's last action: it is scored and trained (Huang et al. 2024, EOS and
    # padding handling; from memory). Worked by hand, EOS = 2, padding = 0.
    ids = torch.tensor([[5, 6, 2, 0, 0], [5, 2, 7, 2, 0], [2, 0, 0, 0, 0], [5, 6, 7, 8, 9]])
    expected = torch.tensor([[1, 1, 1, 0, 0], [1, 1, 0, 0, 0], [1, 0, 0, 0, 0], [1, 1, 1, 1, 1]], dtype=torch.float)
    assert torch.equal(response_mask(ids, eos_id=2), expected)


def _with_saved_generation_settings(folder: Path, model: Path) -> Path:
    """A copy of a tiny model whose saved generation settings reshape the distribution, as released BART,
    Pegasus and Marian configs do: EOS forced at the limit, no repeated token, a minimum length, a repetition
    penalty and a suppressed token."""
    import shutil

    from transformers import GenerationConfig

    shutil.copytree(model, folder)
    saved = GenerationConfig.from_pretrained(model)
    for key, value in {"forced_eos_token_id": saved.eos_token_id, "no_repeat_ngram_size": 1, "min_new_tokens": 4,
                       "repetition_penalty": 3.0, "suppress_tokens": [7]}.items():
        setattr(saved, key, value)
    saved.save_pretrained(folder)
    return folder


def _teacher_forced_logits(policy, ids: torch.Tensor, mask: torch.Tensor, sequences: torch.Tensor) -> torch.Tensor:
    with torch.no_grad():
        logits, _ = policy.net(ids, mask, sequences[:, :-1])
    return logits.float()


@pytest.mark.parametrize("arch", ["t5", "bart"])
def test_sampling_ignores_the_models_saved_generation_settings(tmp_path: Path, tiny_models, arch) -> None:
    # Stored old log-probs must be those of the distribution the tokens were drawn from (Huang et al. 2024,
    # sampling details; from memory): whatever the model folder's generation_config says.
    from transformers import GenerationConfig

    from alignrun.rollout import encode_prompts, sample

    folder = _with_saved_generation_settings(tmp_path / arch, tiny_models[arch])
    torch.manual_seed(0)
    policy = build_policy(BaseSection(model=str(folder)), LoraSection(rank=4), ReferenceSection(), CPU)
    _perturb_lora_b(policy)
    ids, mask = encode_prompts(policy.tokenizer, PROMPTS[:8], 32, CPU)
    eos = policy.tokenizer.eos_token_id
    # the saved settings would bite: generate() as the folder says ends every reply in EOS (forced at the limit)
    saved = GenerationConfig.from_pretrained(folder)
    with torch.no_grad():
        forced = policy.lm.generate(input_ids=ids, attention_mask=mask, generation_config=saved, max_new_tokens=6,
                                    do_sample=False)
    assert (forced[:, 1:] == eos).any(dim=1).all()
    # greedy: every token is the argmax of the policy's own teacher-forced logits
    seqs, logp, _ = sample(policy, ids, mask, 6, do_sample=False, with_values=False)
    logits = _teacher_forced_logits(policy, ids, mask, seqs)
    real = response_mask(seqs[:, 1:], eos).bool()
    assert torch.equal(logits.argmax(-1)[real], seqs[:, 1:][real])
    assert not torch.equal(seqs, forced)
    # sampling: stored log-probs equal a teacher-forced forward (STACK-NOTES: within 1e-6 in eval mode)
    torch.manual_seed(1)
    ro = rollout(policy, PROMPTS[:8], 32, 6, CPU)
    logits = _teacher_forced_logits(policy, ro.prompt_ids, ro.prompt_mask,
                                    torch.cat([ro.decoder_input, ro.decoder_input[:, -1:]], dim=1))
    teacher = torch.log_softmax(logits, -1).gather(-1, ro.response_ids.unsqueeze(-1)).squeeze(-1)
    assert torch.allclose(teacher * ro.response_mask, ro.logp, atol=1e-5)
    # with the saved settings put back, sampling refuses: the drawn tokens would not match the stored log-probs
    policy.lm.get_base_model().generation_config = saved
    with pytest.raises(UserError, match="changed the model's distribution"):
        sample(policy, ids, mask, 6)


@pytest.mark.parametrize("arch", ["t5", "bart"])
def test_the_value_loss_trains_the_value_head_and_never_the_adapters(tiny_models, arch) -> None:
    """The critic shares no gradient with the actor: a loss on the values alone reaches the value head and leaves
    every LoRA parameter's gradient at zero, while a loss on the logits reaches the adapters."""
    policy = build_policy(BaseSection(model=str(tiny_models[arch])), LoraSection(rank=4), ReferenceSection(), CPU)
    _perturb_lora_b(policy)  # with B = 0 the adapters' A would get no gradient from either loss
    ro = rollout(policy, PROMPTS[:4], 32, 6, CPU)
    logits, values = policy.net(ro.prompt_ids, ro.prompt_mask, ro.decoder_input)
    lora = [p for name, p in policy.net.named_parameters() if "lora_" in name]
    values.pow(2).sum().backward(retain_graph=True)
    assert policy.net.value_head.summary.weight.grad.abs().sum() > 0
    assert all(p.grad is None or not p.grad.any() for p in lora)
    logits.logsumexp(-1).sum().backward()
    assert any(p.grad is not None and p.grad.any() for p in lora)


def test_reference_shares_the_base_weights(tiny_models) -> None:
    policy = build_policy(BaseSection(model=str(tiny_models["t5"])), LoraSection(rank=4), ReferenceSection(), CPU)
    assert policy.reference_copy is None  # adapters-off: no second copy of the weights
    with policy.reference() as ref:
        assert ref is policy.lm


def test_lora_target_errors_list_candidates(tiny_models) -> None:
    model = AutoModelForSeq2SeqLM.from_pretrained(tiny_models["t5"])
    with pytest.raises(UserError, match=r"lora.targets: query_proj not found .* its linear layers are: .*\bq\b"):
        lora_targets(model, ["query_proj"])
    assert lora_targets(model, "all-linear") == "all-linear"


def test_base_model_errors(tmp_path: Path, tiny_models) -> None:
    with pytest.raises(UserError, match="base.model"):
        build_policy(BaseSection(model=str(tmp_path / "missing")), LoraSection(), ReferenceSection(), CPU)
    clf = tmp_path / "clf"
    BertForSequenceClassification(BertConfig(vocab_size=50, hidden_size=16, num_hidden_layers=1,
                                             num_attention_heads=2, intermediate_size=32)).save_pretrained(clf)
    with pytest.raises(UserError, match="not an encoder-decoder"):
        build_policy(BaseSection(model=str(clf)), LoraSection(), ReferenceSection(), CPU)


def test_step_prompts_cover_the_data_deterministically() -> None:
    data = [f"p{i}" for i in range(10)]
    first = [step_prompts(data, s, 4, seed=3) for s in range(5)]
    assert first == [step_prompts(data, s, 4, seed=3) for s in range(5)]
    assert sorted(sum(first[:2], []) + first[2][:2]) == sorted(data)  # one pass over the data before repeating


@pytest.mark.slow
@pytest.mark.parametrize("arch", ["t5", "bart"])
def test_end_to_end_run_writes_every_file_and_the_adapter_reloads(tmp_path: Path, tiny_models, arch) -> None:
    token_reward.configure("order")
    cfg = load_config(_write_config(tmp_path, tiny_models[arch], PROMPTS))
    out = tmp_path / "run"
    report = run_experiment(cfg, out, quiet=True, force=True)
    for name in ("config.toml", "environment.json", "preflight.json", "status.json", "metrics.jsonl",
                 "eval_before.jsonl", "eval_after.jsonl", "pairs.jsonl", "pairs.csv", "report.json", "report.md", "report.html",
                 "adapter/adapter_config.json", "adapter/adapter_model.safetensors", "adapter/value_head.safetensors"):
        assert (out / name).is_file(), name
    assert json.loads((out / "status.json").read_text())["state"] == "finished"
    rows = [json.loads(ln) for ln in (out / "metrics.jsonl").read_text().splitlines()]
    assert [r["step"] for r in rows] == [1, 2]
    assert {"reward_mean", "kl_mean", "beta", "policy_loss", "value_loss", "clip_frac", "entropy",
            "approx_kl", "step_s", "tokens_per_s"} <= set(rows[0])
    assert report["schema"] == "alignrun.report/2" and report["run"]["steps"] == 2
    assert report["model"]["trainable_params"] > 0

    # The saved adapter, loaded with peft on the base, reproduces the saved log-probs of the after-samples.
    base = AutoModelForSeq2SeqLM.from_pretrained(tiny_models[arch]).eval()
    model = PeftModel.from_pretrained(base, out / "adapter").eval()
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(out / "adapter")
    samples = [json.loads(ln) for ln in (out / "eval_after.jsonl").read_text().splitlines()]
    samples = [s for s in samples if not s["greedy"]][:6]
    start = model.config.decoder_start_token_id
    for s in samples:
        enc = tok([s["prompt"]], return_tensors="pt", truncation=True, max_length=32)
        ids = torch.tensor([s["token_ids"]])
        dec = torch.cat([torch.tensor([[start]]), ids[:, :-1]], dim=1)
        with torch.no_grad():
            logits = model(**enc, decoder_input_ids=dec).logits
        logp = torch.log_softmax(logits.float(), -1).gather(-1, ids.unsqueeze(-1)).sum().item()
        assert logp == pytest.approx(s["logp"], abs=1e-3)


def _same(a, b) -> bool:
    """Bit-for-bit equality of nested checkpoint contents (tensors compared with torch.equal)."""
    if isinstance(a, torch.Tensor):
        return isinstance(b, torch.Tensor) and a.dtype == b.dtype and torch.equal(a, b)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return isinstance(b, (list, tuple)) and len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


@pytest.mark.parametrize("where", ["reward", "third-minibatch-loss"])
def test_a_nan_mid_step_saves_exactly_the_clean_checkpoint_before_that_step(tmp_path: Path, tiny_models,
                                                                            monkeypatch, where: str) -> None:
    # Common practice: a NaN/inf step is discarded whole. The checkpoint left behind must be bit-for-bit the one
    # of a clean run stopped at the step before: adapter, value head, AdamW moments and step counters, beta, RNG.
    from alignrun import ppo
    from tests import tiny_run

    def experiment(name: str, steps: int) -> Path:
        exp = tiny_run.write_tiny_experiment(tmp_path / name, tiny_models["t5"], steps=steps, checkpoint_every=1,
                                             reward_source=f"{tiny_run.MODULE}:scripted_harm")
        body = {**exp.body, "ppo": {**exp.body["ppo"], "epochs": 2, "weight_decay": 0.01},
                "kl": {"coef": 0.05, "target": 1.0}}
        return tiny_run.write_config(exp.config, body)

    tiny_run.reset_call_counts()
    run_experiment(load_config(experiment("clean", 2)), tmp_path / "clean" / "run", quiet=True)
    tiny_run.reset_call_counts()
    if where == "reward":  # NaN rewards at step 3: sampling has already moved the RNG
        monkeypatch.setenv(tiny_run.NAN_AT_ENV, str(tiny_run.call_of_step(3)))
    else:  # the 3rd of step 3's 4 minibatches (2 epochs x 2): two updates of step 3 are already applied
        calls = {"n": 0}
        real_loss = ppo.policy_loss

        def loss_nan_at_call_11(*args, **kwargs):
            calls["n"] += 1
            loss, clip_frac, approx_kl = real_loss(*args, **kwargs)
            return (loss * float("nan") if calls["n"] == 2 * 4 + 3 else loss), clip_frac, approx_kl

        monkeypatch.setattr(ppo, "policy_loss", loss_nan_at_call_11)
    nan_run = tmp_path / "nan" / "run"
    with pytest.raises(UserError, match=r"after step 2"):
        run_experiment(load_config(experiment("nan", 4)), nan_run, quiet=True)
    clean = tmp_path / "clean" / "run" / "checkpoint"
    assert json.loads((nan_run / "checkpoint" / "checkpoint.json").read_text()) == {"step": 2}
    for name in ("adapter_model.safetensors", "value_head.safetensors"):
        assert (nan_run / "checkpoint" / "adapter" / name).read_bytes() == (clean / "adapter" / name).read_bytes()
        assert (nan_run / "adapter" / name).read_bytes() == (clean / "adapter" / name).read_bytes()
    kept = torch.load(nan_run / "checkpoint" / "trainer_state.pt", weights_only=True)
    expected = torch.load(clean / "trainer_state.pt", weights_only=True)
    assert kept["optimizer"]["state"][0]["step"] == 2 * 4  # AdamW counted the 8 updates of steps 1-2 only
    assert kept["optimizer"]["param_groups"][0]["weight_decay"] == 0.01  # ppo.weight_decay reaches AdamW
    assert _same(kept, expected)


def test_train_step_wiring(tmp_path: Path, tiny_models, monkeypatch) -> None:
    """train_step feeds each PPO piece what the papers say, observed at the calls themselves: old log-probs are the
    policy's (ratio 1 at the first minibatch; Schulman et al. 2017), advantages are whitened over real tokens only
    (Huang et al. 2022), the KL controller sees the per-reply sum of k1 (Ziegler et al. 2019, KL per sample), and
    the one optimiser step lowers the clipped surrogate loss (Schulman et al. 2017, eq. 7, minimised as -L)."""
    from accelerate import Accelerator

    from alignrun import ppo, trainer
    from alignrun.reward import load_scorer

    cfg = load_config(_write_config(
        tmp_path, tiny_models["bart"], PROMPTS, reward={"source": "tests.tiny_run:keyword_harm"},
        kl={"coef": 0.05, "target": 1.0},  # one minibatch of the whole batch, one epoch: one optimiser step
        ppo={"prompts_per_step": 8, "minibatch": 8, "epochs": 1, "value_weight": 0.0, "learning_rate": 1e-3}))
    torch.manual_seed(0)
    policy = build_policy(cfg.base, cfg.lora, cfg.reference, CPU)
    _perturb_lora_b(policy)  # policy != reference, so KL and ratios are not trivially 0 and 1
    with torch.no_grad():  # make EOS likely so that replies end early and padding exists
        policy.lm.get_base_model().final_logits_bias[0, policy.tokenizer.eos_token_id] = 5.0
    seen: dict[str, list] = {"rollout": [], "policy_loss": [], "kl": [], "rows": []}
    real_rollout, real_loss, real_update = trainer.rollout, ppo.policy_loss, ppo.KLController.update
    real_select = Rollout.select
    monkeypatch.setattr(Rollout, "select", lambda self, idx: seen["rows"].append(idx) or real_select(self, idx))
    monkeypatch.setattr(trainer, "rollout", lambda *a, **k: seen["rollout"].append(real_rollout(*a, **k)) or seen["rollout"][-1])
    monkeypatch.setattr(ppo, "policy_loss", lambda *a, **k: seen["policy_loss"].append([x.detach().clone() for x in a[:4]]) or real_loss(*a, **k))
    monkeypatch.setattr(ppo.KLController, "update",
                        lambda self, kl, **k: seen["kl"].append((kl, k)) or real_update(self, kl, **k))
    accelerator = Accelerator(cpu=True)
    optimizer = torch.optim.AdamW([p for p in policy.net.parameters() if p.requires_grad], lr=1e-3, weight_decay=0.0)
    net, optimizer = accelerator.prepare(policy.net, optimizer)
    controller = ppo.KLController(beta=0.05, target=1.0)
    row = trainer.train_step(policy, net, optimizer, accelerator, load_scorer(cfg.reward, "reward"), controller,
                             PROMPTS[:8], cfg, 0, CPU)
    ro = seen["rollout"][0].select(seen["rows"][0])  # the rows in the minibatch's (shuffled) order
    mask = ro.response_mask.bool()
    assert (~mask).any() and mask.sum(1).gt(1).any(), "precondition: some replies end early, some are longer"
    (logp_new, logp_old, advantages, loss_mask), = seen["policy_loss"]
    assert torch.equal(loss_mask, ro.response_mask)
    # old log-probs are the policy's own: at the first minibatch the ratio is 1 (not pi / pi_ref)
    assert (ro.logp - ro.ref_logp)[mask].abs().max() > 1e-3
    assert torch.allclose(logp_new[mask], logp_old[mask], atol=1e-5)
    # whitening over real tokens: mean 0, sample variance 1 there (numpy), 0 on padding
    real = advantages[mask].double().numpy()
    assert real.mean() == pytest.approx(0.0, abs=1e-5) and real.var(ddof=1) == pytest.approx(1.0, rel=1e-4)
    assert (advantages[~mask] == 0).all()
    # the controller and the metrics get the mean over replies of the per-reply sum of log pi - log pi_ref
    per_reply = ((ro.logp - ro.ref_logp) * ro.response_mask).sum(1).mean()
    assert seen["kl"] == [(pytest.approx(float(per_reply), rel=1e-5), {"episodes": 8})]
    assert row["kl_mean"] == seen["kl"][0][0]
    # replies with no EOS were cut at max_new_tokens: their share is logged
    no_eos = (ro.response_ids != policy.tokenizer.eos_token_id).all(dim=1)
    assert row["truncated_share"] == pytest.approx(float(no_eos.float().mean()))
    assert 0 < row["truncated_share"] < 1
    assert row["beta"] == 0.05 and controller.beta != 0.05
    # the optimiser step was taken, in the direction that lowers -L: from ratio 1 (-L = -mean A = 0) downwards
    with torch.no_grad():
        logits, _ = policy.net(ro.prompt_ids, ro.prompt_mask, ro.decoder_input, ro.encoder_hidden)
    after = torch.log_softmax(logits.float(), -1).gather(-1, ro.response_ids.unsqueeze(-1)).squeeze(-1)
    before_loss = real_loss(logp_old, logp_old, advantages, ro.response_mask, 0.2)[0]
    after_loss = real_loss(after, logp_old, advantages, ro.response_mask, 0.2)[0]
    assert float(after_loss) < float(before_loss) - 1e-4


def test_checkpoint_keeps_every_process_rng_and_reads_the_older_single_rng_form(tmp_path: Path, tiny_models) -> None:
    # common practice: a resumed run draws the random numbers the uninterrupted one would have drawn
    from alignrun import ppo
    from alignrun.checkpoint import load_checkpoint, rng_state, save_checkpoint

    policy = build_policy(BaseSection(model=str(tiny_models["t5"])), LoraSection(rank=4), ReferenceSection(), CPU)
    optimizer = torch.optim.AdamW([p for p in policy.net.parameters() if p.requires_grad])
    controller = ppo.KLController(beta=0.1)
    torch.manual_seed(5)
    expected = torch.get_rng_state()
    other = {**rng_state(), "torch": torch.manual_seed(6).get_state()}
    torch.manual_seed(5)
    save_checkpoint(tmp_path / "ckpt", policy, optimizer, controller, 3, [rng_state(), other])
    torch.manual_seed(0)
    with pytest.raises(UserError, match="written by 2 process"):
        load_checkpoint(tmp_path / "ckpt", policy, optimizer, controller)
    assert load_checkpoint(tmp_path / "ckpt", policy, optimizer, controller, process=1, processes=2) == 3
    assert torch.equal(torch.get_rng_state(), other["torch"])
    state = torch.load(tmp_path / "ckpt" / "trainer_state.pt", weights_only=True)  # the older form: three keys
    older = {k: v for k, v in state.items() if k != "rng"}
    older.update({f"rng_{key}": value for key, value in state["rng"][0].items()})
    torch.save(older, tmp_path / "ckpt" / "trainer_state.pt")
    torch.manual_seed(0)
    assert load_checkpoint(tmp_path / "ckpt", policy, optimizer, controller) == 3
    assert torch.equal(torch.get_rng_state(), expected)
