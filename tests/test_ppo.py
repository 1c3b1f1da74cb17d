"""alignrun.ppo against published formulas, worked examples (REFERENCES.md) and scipy."""

import math

import numpy as np
import pytest
import scipy.signal
import scipy.stats
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from alignrun.ppo import (
    KLController,
    gae,
    kl_k1,
    kl_k2,
    kl_k3,
    masked_mean,
    masked_var,
    penalised_rewards,
    policy_loss,
    value_loss,
    whiten,
)

# Two explicit categorical distributions: the policy p samples, the reference q is compared against.
P = np.array([0.4, 0.3, 0.15, 0.1, 0.05])
Q = np.array([0.2, 0.2, 0.2, 0.2, 0.2])


def test_kl_estimators_are_unbiased_in_exact_expectation():
    # Schulman 2020 (from memory): E_p[k1] = E_p[k3] = KL(p||q); exact value from scipy.stats.entropy(p, q)
    logp, logq = torch.tensor(np.log(P)), torch.tensor(np.log(Q))
    exact = scipy.stats.entropy(P, Q)
    assert float((torch.tensor(P) * kl_k1(logp, logq)).sum()) == pytest.approx(exact, rel=1e-12)
    assert float((torch.tensor(P) * kl_k3(logp, logq)).sum()) == pytest.approx(exact, rel=1e-12)


def test_kl_estimators_monte_carlo_match_scipy_entropy():
    # Schulman 2020 (from memory): k1 and k3 averaged over samples x ~ p estimate KL(p||q) = scipy.stats.entropy(p, q)
    n = 200_000
    generator = torch.Generator().manual_seed(0)
    x = torch.multinomial(torch.tensor(P), n, replacement=True, generator=generator)
    logp, logq = torch.tensor(np.log(P))[x], torch.tensor(np.log(Q))[x]
    exact = scipy.stats.entropy(P, Q)
    log_ratio = np.log(Q / P)
    for estimator, per_category in ((kl_k1, -log_ratio), (kl_k3, np.expm1(log_ratio) - log_ratio)):
        # tolerance: 5 standard errors of the mean, the standard deviation taken exactly from the distribution
        sd = math.sqrt(float(P @ per_category**2) - exact**2)
        assert float(estimator(logp, logq).mean()) == pytest.approx(exact, abs=5 * sd / math.sqrt(n))


def test_kl_k2_is_half_squared_log_ratio_and_close_to_kl_for_close_distributions():
    # Schulman 2020 (from memory): k2 = 0.5 (log r)^2 has small bias when p and q are close
    near = np.array([0.38, 0.31, 0.16, 0.1, 0.05])
    logp, logq = torch.tensor(np.log(P)), torch.tensor(np.log(near))
    expected_k2 = float(P @ (0.5 * np.log(near / P) ** 2))
    assert float((torch.tensor(P) * kl_k2(logp, logq)).sum()) == pytest.approx(expected_k2, rel=1e-12)
    assert expected_k2 == pytest.approx(scipy.stats.entropy(P, near), rel=0.05)


@settings(deadline=None, max_examples=200)
@given(
    st.lists(st.floats(-40, 0, allow_nan=False), min_size=1, max_size=20),
    st.lists(st.floats(-40, 0, allow_nan=False), min_size=1, max_size=20),
)
def test_k3_and_k2_never_negative(a, b):
    # Schulman 2020 (from memory): k3 = (r - 1) - log r >= 0 since log r <= r - 1; k2 is a square
    size = min(len(a), len(b))
    for dtype in (torch.float32, torch.float64):
        logp, ref = torch.tensor(a[:size], dtype=dtype), torch.tensor(b[:size], dtype=dtype)
        assert (kl_k3(logp, ref) >= 0).all()
        assert (kl_k2(logp, ref) >= 0).all()
    assert float(kl_k3(torch.tensor(a[:1]), torch.tensor(a[:1])).sum()) == 0.0


def test_penalised_rewards_hand_example_with_padding():
    # Ziegler et al. 2019 / Stiennon et al. 2020 (REFERENCES.md): r_t = -beta (log pi - log pi_ref) on real tokens,
    # plus the sequence score on the last real token; nothing on padding. Expected values worked by hand.
    nan = float("nan")
    logp = torch.tensor([[-1.0, -2.0, -0.5, nan], [-0.2, -0.4, -0.6, -0.8], [-3.0, -3.0, -3.0, -3.0]])
    ref = torch.tensor([[-1.5, -1.0, -0.5, -9.0], [-0.2, -0.2, -0.2, -0.2], [-1.0, -1.0, -1.0, -1.0]])
    mask = torch.tensor([[1, 1, 1, 0], [1, 1, 1, 1], [0, 0, 0, 0]])
    score = torch.tensor([2.0, -1.0, 5.0])
    rewards, kl = penalised_rewards(score, logp, ref, mask, beta=0.1)
    expected_kl = torch.tensor([[0.5, -1.0, 0.0, 0.0], [0.0, -0.2, -0.4, -0.6], [0.0, 0.0, 0.0, 0.0]])
    expected_rewards = torch.tensor(
        [
            [-0.05, 0.1, 0.0 + 2.0, 0.0],  # score on t=2, the last real token; padding t=3 untouched
            [0.0, 0.02, 0.04, 0.06 - 1.0],
            [0.0, 0.0, 0.0, 0.0],  # an empty generation gets nothing (and no NaN)
        ]
    )
    torch.testing.assert_close(kl, expected_kl)
    torch.testing.assert_close(rewards, expected_rewards)


def _reference_gae(r, v, gamma, lam):
    # Schulman et al. 2016 via the discounted-sum trick in REFERENCES.md; V after the last token is 0
    deltas = r + gamma * np.append(v[1:], 0.0) - v
    return scipy.signal.lfilter([1], [1, -gamma * lam], deltas[::-1])[::-1], deltas


@pytest.mark.parametrize("gamma", [1.0, 0.9])
@pytest.mark.parametrize("lam", [0.0, 1.0, 0.95])
def test_gae_matches_scipy_lfilter_with_padding(gamma, lam):
    rng = np.random.default_rng(0)
    lengths = [6, 3, 1, 0]
    rewards = torch.tensor(rng.normal(size=(4, 6)))
    values = torch.tensor(rng.normal(size=(4, 6)))
    mask = torch.tensor([[1.0] * n + [0.0] * (6 - n) for n in lengths], dtype=torch.float64)
    adv, returns = gae(rewards, values, mask, gamma, lam)
    for row, n in enumerate(lengths):
        r, v = rewards[row, :n].numpy(), values[row, :n].numpy()
        expected, deltas = _reference_gae(r, v, gamma, lam)
        np.testing.assert_allclose(adv[row, :n].numpy(), expected, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(returns[row, :n].numpy(), expected + v, rtol=1e-10, atol=1e-12)
        assert (adv[row, n:] == 0).all() and (returns[row, n:] == 0).all()
        if lam == 1.0:
            # Schulman et al. 2016: lambda = 1 gives the discounted return minus V
            discounted = [sum(gamma**k * r[t + k] for k in range(n - t)) for t in range(n)]
            np.testing.assert_allclose(adv[row, :n].numpy(), np.array(discounted) - v, rtol=1e-10, atol=1e-12)
        if lam == 0.0:
            # Schulman et al. 2016: lambda = 0 gives the one-step TD error
            np.testing.assert_allclose(adv[row, :n].numpy(), deltas, rtol=1e-10, atol=1e-12)


def _one_token_rows(rho, adv):
    logp_old = torch.zeros(len(rho), 1)
    logp_new = torch.log(torch.tensor(rho, dtype=torch.float64)).float().unsqueeze(1)
    return logp_new, logp_old, torch.tensor(adv).unsqueeze(1), torch.ones(len(rho), 1)


@pytest.mark.parametrize(("rho", "adv", "objective"), [(1.5, 1.0, 1.2), (0.5, -1.0, -0.8), (0.9, 2.0, 1.8)])
def test_policy_loss_worked_examples(rho, adv, objective):
    # Schulman et al. 2017, worked examples from REFERENCES.md (eps = 0.2); the minimised loss is -objective
    loss, _, _ = policy_loss(*_one_token_rows([rho], [adv]), clip_eps=0.2)
    assert float(loss) == pytest.approx(-objective, rel=1e-6)


def test_policy_loss_batch_clip_fraction_and_approx_kl_ignore_padding():
    # Schulman et al. 2017 worked examples (REFERENCES.md) in one batch, with a padding token of extreme values
    rho = [1.5, 0.5, 0.9, 1.5]
    logp_new = torch.log(torch.tensor([[rho[0], rho[1]], [rho[2], 50.0]]))
    logp_old = torch.zeros(2, 2)
    adv = torch.tensor([[1.0, -1.0], [2.0, 1e6]])
    mask = torch.tensor([[1.0, 1.0], [1.0, 0.0]])
    loss, clip_frac, approx_kl = policy_loss(logp_new, logp_old, adv, mask, clip_eps=0.2)
    assert float(loss) == pytest.approx(-(1.2 - 0.8 + 1.8) / 3, rel=1e-6)
    # clip fraction = share of real tokens where the clipped term is in effect: the first two (common practice)
    assert float(clip_frac) == pytest.approx(2 / 3)
    # approx KL = masked mean of k3 = (rho - 1) - log rho with samples from the old policy (Schulman 2020)
    expected_kl = sum((r - 1) - math.log(r) for r in rho[:3]) / 3
    assert float(approx_kl) == pytest.approx(expected_kl, rel=1e-5)


def test_policy_loss_clip_fraction_counts_only_active_clipping():
    # Schulman et al. 2017: min(rho A, clip(rho) A) with rho=1.5, A=-1 keeps the unclipped -1.5, so no clipping
    loss, clip_frac, _ = policy_loss(*_one_token_rows([1.5], [-1.0]), clip_eps=0.2)
    assert float(loss) == pytest.approx(1.5, rel=1e-6)
    assert float(clip_frac) == 0.0


def test_policy_loss_sign_and_gradient_direction():
    # Schulman et al. 2017: maximising the objective raises log pi for A > 0, so the minimised loss falls with it;
    # beyond the clip range the gradient vanishes
    logp_new = torch.tensor([[math.log(1.1), math.log(1.5)]], requires_grad=True)
    loss, _, _ = policy_loss(logp_new, torch.zeros(1, 2), torch.tensor([[1.0, 1.0]]), torch.ones(1, 2), 0.2)
    loss.backward()
    assert logp_new.grad[0, 0] < 0
    assert logp_new.grad[0, 1] == 0
    # at rho = 1 the loss is -mean(A) (Schulman et al. 2017, eq. 7 with rho = 1)
    at_one, _, _ = policy_loss(
        torch.zeros(1, 3), torch.zeros(1, 3), torch.tensor([[1.0, 2.0, -6.0]]), torch.ones(1, 3), 0.2
    )
    assert float(at_one) == pytest.approx(1.0)


def test_policy_loss_padding_cannot_reach_the_gradient():
    # padding may hold any log-prob (even -inf or NaN); its gradient must be exactly 0 (common practice)
    logp_new = torch.tensor([[-0.5, float("-inf"), float("nan")]], requires_grad=True)
    mask = torch.tensor([[1.0, 0.0, 0.0]])
    loss, clip_frac, approx_kl = policy_loss(logp_new, torch.full((1, 3), -0.6), torch.ones(1, 3), mask, 0.2)
    loss.backward()
    assert torch.isfinite(loss) and torch.isfinite(clip_frac) and torch.isfinite(approx_kl)
    assert logp_new.grad[0, 0] < 0 and (logp_new.grad[0, 1:] == 0).all()


def test_value_loss_hand_computation():
    # Huang et al. 2022 (value loss clipping), computed by hand with clip 0.2:
    # token 1: V_clip = 0.5 + 0.2 = 0.7, max((1-2)^2, (0.7-2)^2) = 1.69 (clipped term wins)
    # token 2: V_clip = 0.5 - 0.2 = 0.3, max((0-1)^2, (0.3-1)^2) = 1.0
    # token 3: unchanged value, (2-0)^2 = 4.0; token 4 is padding
    values_new = torch.tensor([[1.0, 0.0, 2.0, 100.0]])
    values_old = torch.tensor([[0.5, 0.5, 2.0, -100.0]])
    returns = torch.tensor([[2.0, 1.0, 0.0, 7.0]])
    mask = torch.tensor([[1, 1, 1, 0]])
    loss, clip_frac = value_loss(values_new, values_old, returns, mask, clip=0.2)
    assert float(loss) == pytest.approx(0.5 * (1.69 + 1.0 + 4.0) / 3, rel=1e-6)
    assert float(clip_frac) == pytest.approx(1 / 3)


def test_masked_mean_and_var_against_numpy():
    # numpy mean/var (ddof 0 and 1) over the selected entries only (common practice)
    rng = np.random.default_rng(1)
    x = rng.normal(size=(3, 5))
    mask = np.array([[1, 1, 0, 0, 0], [1, 1, 1, 1, 1], [0, 0, 0, 0, 0]])
    tx, tm = torch.tensor(x), torch.tensor(mask)
    assert float(masked_mean(tx, tm)) == pytest.approx(x[mask == 1].mean())
    np.testing.assert_allclose(masked_mean(tx, tm, dim=1).numpy(), [x[0, :2].mean(), x[1].mean(), 0.0])
    assert float(masked_var(tx, tm)) == pytest.approx(x[mask == 1].var(ddof=1))
    assert float(masked_var(tx, tm, unbiased=False)) == pytest.approx(x[mask == 1].var(ddof=0))


def test_empty_masks_give_zeros_not_nan():
    # an all-padding batch (every generation empty) must not poison the update with NaN (common practice)
    x = torch.randn(2, 3)
    empty = torch.zeros(2, 3)
    assert float(masked_mean(x, empty)) == 0.0
    assert float(masked_var(x, empty)) == 0.0
    assert (whiten(x, empty) == 0).all()
    adv, ret = gae(x, x, empty, 1.0, 0.95)
    assert (adv == 0).all() and (ret == 0).all()
    for out in (*policy_loss(x, x, x, empty, 0.2), *value_loss(x, x, x, empty, 0.2)):
        assert torch.isfinite(out).all()


@st.composite
def _batch_with_mask(draw):
    b, t = draw(st.integers(1, 4)), draw(st.integers(1, 8))
    values = draw(st.lists(st.floats(-1e3, 1e3), min_size=b * t, max_size=b * t))
    mask = draw(st.lists(st.booleans(), min_size=b * t, max_size=b * t))
    x, m = torch.tensor(values, dtype=torch.float64).view(b, t), torch.tensor(mask).view(b, t)
    selected = x[m].numpy()
    if len(selected) < 2 or selected.std() < 1.0:
        mask = [False] * (b * t)
        m = torch.tensor(mask).view(b, t)
    return x, m


@settings(deadline=None, max_examples=150)
@given(_batch_with_mask(), st.floats(0.1, 10), st.floats(-100, 100))
def test_whiten_invariants(batch, scale, shift):
    # Huang et al. 2022 per-batch whitening: over the real entries mean 0 and (unbiased) variance 1, padding 0,
    # unchanged by an affine map a x + b with a > 0; shift_mean=False keeps the original mean
    x, m = batch
    out = whiten(x, m)
    assert (out[~m] == 0).all()
    if m.sum() >= 2:
        selected = out[m].numpy()
        assert selected.mean() == pytest.approx(0.0, abs=1e-9)
        assert selected.var(ddof=1) == pytest.approx(1.0, rel=1e-6)
        torch.testing.assert_close(whiten(scale * x + shift, m), out, rtol=1e-5, atol=1e-5)
        kept_mean = whiten(x, m, shift_mean=False)[m].numpy().mean()
        assert kept_mean == pytest.approx(x[m].numpy().mean(), abs=1e-6 * (1 + abs(kept_mean)))


def test_kl_controller_worked_example():
    # Ziegler et al. 2019 §2.2, worked example from REFERENCES.md (K_beta = 0.1)
    assert KLController(beta=0.2, target=6.0, gain=0.1).update(9.0) == pytest.approx(0.204)
    assert KLController(beta=0.2, target=6.0, gain=0.1).update(3.0) == pytest.approx(0.196)
    # the error is clipped to +-0.2, so a KL far above target moves beta no more than KL = 9 did
    assert KLController(beta=0.2, target=6.0, gain=0.1).update(600.0) == pytest.approx(0.204)
    # e = 4.5/6 - 1 = -0.25 -> clipped to -0.2; e = 7/6 - 1 -> beta (1 + 0.1/6) (hand computation)
    controller = KLController(beta=0.2, target=6.0)
    assert controller.update(4.5) == pytest.approx(0.196)
    assert controller.update(7.0) == pytest.approx(0.196 * (1 + 0.1 / 6))


def test_kl_controller_fixed_and_state_round_trip():
    # Ziegler et al. 2019: without a target beta stays fixed
    fixed = KLController(beta=0.05)
    assert fixed.update(100.0) == 0.05 and fixed.update(0.0) == 0.05
    adaptive = KLController(beta=0.2, target=6.0, gain=0.1)
    adaptive.update(9.0)
    restored = KLController(beta=1.0)
    restored.load_state_dict(adaptive.state_dict())
    assert restored == adaptive
    assert restored.update(9.0) == pytest.approx(0.204 * 1.02)
    with pytest.raises(ValueError, match="finite"):
        adaptive.update(float("nan"))


def test_kl_controller_horizon_form_worked_example():
    # Ziegler et al. 2019, released code (REFERENCES.md worked example, from memory): beta <- beta (1 + e n / H);
    # beta = 0.2, e = 0.2 (KL 9 vs target 6, clipped), n = 16, H = 10,000 -> 0.2 (1 + 0.00032) = 0.200064
    assert KLController(beta=0.2, target=6.0, horizon=10_000).update(9.0, episodes=16) == pytest.approx(0.200064)
    # the speed per reply does not depend on how replies are grouped into steps: 2 steps of 8 give
    # 0.2 (1 + 0.00016)^2 = 0.2 (1.00032 + 2.56e-8), the one step of 16 to first order
    split = KLController(beta=0.2, target=6.0, horizon=10_000)
    split.update(9.0, episodes=8)
    assert split.update(9.0, episodes=8) == pytest.approx(0.2 * 1.00016**2, rel=1e-12)
    assert 0.2 * 1.00016**2 == pytest.approx(0.200064, rel=1e-7)
    # the per-step gain form moves beta per step whatever the step size (REFERENCES.md: 0.2 -> 0.204)
    assert KLController(beta=0.2, target=6.0, gain=0.1).update(9.0, episodes=16) == pytest.approx(0.204)
    assert "n / 10000" in KLController(beta=0.2, target=6.0, horizon=10_000).rule()


def test_value_loss_without_clipping_is_half_the_squared_error():
    # Huang et al. 2022: with value clipping off the loss is 0.5 E[(V - R)^2]; same tokens as the hand example
    values_new = torch.tensor([[1.0, 0.0, 2.0, 100.0]])
    returns = torch.tensor([[2.0, 1.0, 0.0, 7.0]])
    mask = torch.tensor([[1, 1, 1, 0]])
    loss, clip_frac = value_loss(values_new, torch.zeros(1, 4), returns, mask, clip=None)
    assert float(loss) == pytest.approx(0.5 * (1.0 + 1.0 + 4.0) / 3, rel=1e-6)
    assert float(clip_frac) == 0.0
