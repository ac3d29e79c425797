"""Gradient estimators against closed forms, against each other, and against their own accounting.

Reference problem (closed form): the double integrator ``x' = A x + B u`` (zero-order hold of ``xdd = u`` with
m = 1 kg, which RK4 reproduces exactly), one step, linear policy ``u = K x``; ``Q`` and ``R`` are the per-step
weights, the task's times dt (the running cost is ``(x'Qx + u'Ru) dt``). Its minibatch objective
``J(K) = mean_x [x'Qx + x'K'RKx + x'(A + BK)' P (A + BK) x]`` is a quadratic in the parameters ``K`` with
``grad J = 2 (R K + B'P (A + BK)) S``, ``S = mean_x x x'`` (matrix calculus, e.g. Petersen & Pedersen, *The
Matrix Cookbook*, eqs. 78-82). For a quadratic, Gaussian smoothing in parameters leaves the gradient unchanged
(the smoothing adds the constant ``sigma^2 tr(H) / 2``), and so does Gaussian noise on the one action (it adds
``s^2 (R + B'PB)``, independent of K): every estimator here must be unbiased for this same ``grad J``.

Statistical checks use fixed seeds, so they are deterministic; each states its confidence level and also checks
its own power (the interval must be narrow enough to expose a bias of 10 % of the gradient's norm), so none of them can pass vacuously.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import torch
from hydra import compose, initialize_config_dir

import envs
from apg import Analytic, Policy, PolicySettings, make_policy, rollout, train, train_record
from apg.cli import config
from apg.cli.train import CONFIG_DIR
from apg.estimators import (ESTIMATORS, AlphaOrder, EstimatorSettings, EvolutionStrategies, LikelihoodRatio,
                            centred_ranks, make_estimator)
from envs.double_integrator import DoubleIntegrator

F64 = torch.float64
DT = 0.1
LINEAR = PolicySettings(kind="linear", bias=False, normalise="none", squash="none", output_gain=1.0)
K0 = [[-2.0, -0.5]]  # a stabilising gain away from the optimum: both gradient entries are ~0.17 (not near zero)
# z for a two-sided 99.9 % family-wise interval over the 2 gradient entries (Bonferroni: 0.05 % each side).
Z = 3.48


def lq_problem(batch: int = 32):
    system = envs.build("double_integrator", dt=DT)
    policy = Policy(LINEAR, 2, system.action_low, system.action_high).to(F64)
    with torch.no_grad():
        policy.net[0].weight.copy_(torch.tensor(K0, dtype=F64))
    x0 = system.sample_initial(batch, torch.Generator().manual_seed(0), F64)
    return system, policy, x0


def closed_form_gradient(x0: torch.Tensor) -> np.ndarray:
    a = np.array([[1.0, DT], [0.0, 1.0]])
    b = np.array([[DT ** 2 / 2], [DT]])
    q, r = np.diag([1.0, 0.1]) * DT, np.array([[0.1]]) * DT  # the running cost is (x'Qx + u'Ru) dt
    p = scipy.linalg.solve_discrete_are(a, b, q, r)
    k = np.array(K0)
    xs = x0.numpy()
    s = xs.T @ xs / xs.shape[0]
    return 2 * (r @ k + b.T @ p @ (a + b @ k)) @ s  # (1, 2), same layout as the weight


def flat(grads) -> torch.Tensor:
    return torch.cat([g.reshape(-1) for g in grads])


def draws(estimator, system, policy, x0, horizon: int, count: int, first_seed: int = 0) -> torch.Tensor:
    """``count`` independent estimates, ``(count, P)``."""
    return torch.stack([flat(estimator.estimate(system, policy, x0, horizon,
                                                torch.Generator().manual_seed(first_seed + i)).grads)
                        for i in range(count)])


def test_analytic_equals_the_closed_form_gradient():
    system, policy, x0 = lq_problem()
    g = flat(Analytic().estimate(system, policy, x0, 1, torch.Generator()).grads)
    # float64 end to end; the only difference from the numpy closed form is rounding (~1e-15 relative).
    torch.testing.assert_close(g, torch.from_numpy(closed_form_gradient(x0)).reshape(-1), rtol=1e-10, atol=1e-12)


UNBIASED = [
    ("es", dict(pairs=8, sigma=0.05)),
    ("likelihood_ratio", dict(samples=8, action_noise=0.05)),
    ("alpha_order", dict(samples=8, action_noise=0.05, alpha=0.5)),
]


@pytest.mark.parametrize("name, options", UNBIASED, ids=[n for n, _ in UNBIASED])
def test_sampled_estimators_are_unbiased_on_the_quadratic(name, options):
    """The mean of 1500 seeded estimates lies in the 99.9 % interval around the closed-form gradient."""
    system, policy, x0 = lq_problem()
    est = make_estimator(EstimatorSettings(name=name, **options))
    g = draws(est, system, policy, x0, 1, 1500)
    true = torch.from_numpy(closed_form_gradient(x0)).reshape(-1)
    mean, se = g.mean(0), g.std(0) / math.sqrt(g.shape[0])
    assert (se * Z < 0.1 * true.norm()).all(), f"interval too wide to detect a 10% bias: {se * Z} vs {true}"
    assert ((mean - true).abs() < Z * se).all(), f"mean {mean} outside {true} +- {Z * se}"


def test_es_variance_matches_gaussian_moments_and_shrinks_as_one_over_n():
    """For a quadratic, an antithetic difference is the exact directional derivative, so
    ``g_hat = (1/n) sum_i (g . eps_i) eps_i`` and ``Var g_hat_j = (|g|^2 + g_j^2) / n`` (Isserlis' theorem for
    the fourth moments of a standard normal). Checked at n = 2 and n = 32 against the formula."""
    system, policy, x0 = lq_problem()
    true = torch.from_numpy(closed_form_gradient(x0)).reshape(-1)
    for n in (2, 32):
        g = draws(EvolutionStrategies(EstimatorSettings(name="es", pairs=n, sigma=0.05)), system, policy, x0, 1, 2000)
        expected = (true.square().sum() + true.square()) / n
        # A sample variance from 2000 draws of a heavy-tailed (product-normal) quantity: relative standard error
        # sqrt((kurtosis - 1) / 2000) <= ~0.07 at kurtosis <= 10; 25 % is more than three of them, and a wrong
        # 1/n scaling (16x between the two n) or a missing antithetic pair (2x) falls far outside.
        torch.testing.assert_close(g.var(0), expected, rtol=0.25, atol=0.0)


@pytest.mark.parametrize("name", ["likelihood_ratio", "alpha_order"])
def test_action_noise_estimator_variance_shrinks_as_one_over_n(name):
    """Variance of the mean of n noisy rollouts per state falls as 1/n (independent draws; the leave-one-out
    baseline adds an O(1/n^2) term). From n = 4 to n = 32 the ratio must be near 8: a band [5.5, 11] rejects
    a constant variance (1) and 1/n^2 (64)."""
    system, policy, x0 = lq_problem()
    var = {}
    for n in (4, 32):
        est = make_estimator(EstimatorSettings(name=name, samples=n, action_noise=0.05))
        var[n] = draws(est, system, policy, x0, 1, 800).var(0).sum()
    assert 5.5 < float(var[4] / var[32]) < 11.0, var


def test_leave_one_out_baseline_cuts_the_variance():
    """A baseline leaves the score-function estimator unbiased and, when it tracks the cost, cuts its variance
    (Williams 1992, sec. 8; Greensmith, Bartlett, Baxter 2004). Without one, every draw carries the whole cost
    (~2 here) times a zero-mean score; with it, only the cost's deviation. Measured: a factor ~5000; required 100."""
    system, policy, x0 = lq_problem()
    var = {b: draws(LikelihoodRatio(EstimatorSettings(name="likelihood_ratio", samples=8, action_noise=0.05,
                                                       baseline=b)), system, policy, x0, 1, 300).var(0).sum()
           for b in ("leave_one_out", "none")}
    assert var["none"] > 100 * var["leave_one_out"], var


def test_likelihood_ratio_agrees_with_the_pathwise_gradient_over_a_long_horizon():
    """Over 15 steps the action-smoothed objective has no closed form, but two different identities estimate its
    gradient: the score function (likelihood ratio) and the reparameterised pathwise derivative. Their means
    must agree within the combined 99.9 % interval; the pathwise one serves as the reference in the study."""
    system, policy, x0 = lq_problem(batch=16)
    lr = LikelihoodRatio(EstimatorSettings(name="likelihood_ratio", samples=16, action_noise=0.05))
    g = draws(lr, system, policy, x0, 15, 1200)
    refs = torch.stack([flat(lr.reference_gradient(system, policy, x0, 15, torch.Generator().manual_seed(10_000 + i),
                                                   samples=64)) for i in range(40)])
    se = torch.sqrt(g.var(0) / g.shape[0] + refs.var(0) / refs.shape[0])
    assert (Z * se < 0.1 * refs.mean(0).norm()).all()
    assert ((g.mean(0) - refs.mean(0)).abs() < Z * se).all(), (g.mean(0), refs.mean(0), se)


def test_es_reference_is_the_exact_gradient_on_a_quadratic():
    """Smoothing a quadratic does not move its gradient, so the mean of BPTT gradients at antithetic perturbed
    parameters equals the closed form (to rounding: the antithetic pairs cancel the linear term exactly)."""
    system, policy, x0 = lq_problem()
    es = EvolutionStrategies(EstimatorSettings(name="es", sigma=0.3))
    ref = flat(es.reference_gradient(system, policy, x0, 1, torch.Generator().manual_seed(0), samples=4))
    torch.testing.assert_close(ref, torch.from_numpy(closed_form_gradient(x0)).reshape(-1), rtol=1e-9, atol=1e-12)


class _NoisyPolicy(torch.nn.Module):
    """``policy(obs) + noise[t]`` clipped, at the t-th call: an independent reimplementation of the noisy rollout."""

    def __init__(self, policy, noise, low, high):
        super().__init__()
        self.policy, self.noise, self.t, self.low, self.high = policy, noise, 0, low, high

    def forward(self, obs):
        u = torch.clamp(self.policy(obs) + self.noise[self.t], self.low, self.high)
        self.t += 1
        return u


def test_alpha_order_reduces_to_each_end():
    """alpha = 1: the pathwise BPTT gradient of the same noisy rollouts (rebuilt here with ``rollout``);
    alpha = 0: the likelihood-ratio estimate from the same draws; in between: the affine blend of the two."""
    torch.manual_seed(0)
    system = envs.build("pendulum")
    policy = make_policy(PolicySettings(hidden=(8,)), system, dtype=F64)
    x0 = system.sample_initial(6, torch.Generator().manual_seed(1), F64)
    n, horizon = 3, 12

    def alpha(a):
        return flat(AlphaOrder(EstimatorSettings(name="alpha_order", samples=n, alpha=a)).estimate(
            system, policy, x0, horizon, torch.Generator().manual_seed(5)).grads)

    xi = torch.randn(horizon, n * 6, 1, generator=torch.Generator().manual_seed(5), dtype=F64)
    half_range = (system.action_high[0] - system.action_low[0]) / 2
    noisy = _NoisyPolicy(policy, xi * 0.1 * half_range, system.action_low[0], system.action_high[0])
    pathwise = torch.autograd.grad(rollout(system, noisy, x0.repeat(n, 1), horizon).total_cost.mean(),
                                   list(policy.parameters()))
    torch.testing.assert_close(alpha(1.0), flat(pathwise), rtol=1e-10, atol=1e-12)
    score = flat(LikelihoodRatio(EstimatorSettings(name="likelihood_ratio", samples=n)).estimate(
        system, policy, x0, horizon, torch.Generator().manual_seed(5)).grads)
    torch.testing.assert_close(alpha(0.0), score, rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(alpha(0.3), 0.3 * flat(pathwise) + 0.7 * score, rtol=1e-9, atol=1e-10)


def test_alpha_order_at_vanishing_noise_is_the_analytic_gradient():
    """The pathwise gradient is continuous in the noise level: at 1e-9 of the half-range it is BPTT's."""
    torch.manual_seed(0)
    system = envs.build("cartpole")
    policy = make_policy(PolicySettings(hidden=(8,)), system, dtype=F64)
    x0 = system.sample_initial(8, torch.Generator().manual_seed(1), F64)
    a1 = AlphaOrder(EstimatorSettings(name="alpha_order", alpha=1.0, action_noise=1e-9, samples=2))
    got = flat(a1.estimate(system, policy, x0, 20, torch.Generator().manual_seed(0)).grads)
    exact = flat(Analytic().estimate(system, policy, x0, 20, torch.Generator()).grads)
    # Perturbing actions by ~1e-8 N moves a smooth gradient by ~1e-8 relative.
    torch.testing.assert_close(got, exact, rtol=1e-6, atol=1e-9)


def test_rank_shaping_is_invariant_to_the_cost_scale():
    """Centred ranks depend only on the order of the costs (Salimans et al. 2017, sec. 2.2): scaling every cost
    weight by 1000 (so every total cost, P included, scales by 1000) leaves the shaped update unchanged and
    scales the plain one by 1000."""
    system, policy, x0 = lq_problem()
    big = envs.build("double_integrator", dt=DT, task={"q_position": 1000.0, "q_velocity": 100.0, "r_force": 100.0})
    for shaped in (True, False):
        es = EvolutionStrategies(EstimatorSettings(name="es", pairs=6, rank_shaping=shaped))
        g1 = flat(es.estimate(system, policy, x0, 1, torch.Generator().manual_seed(3)).grads)
        g2 = flat(es.estimate(big, policy, x0, 1, torch.Generator().manual_seed(3)).grads)
        torch.testing.assert_close(g2, g1 if shaped else 1000 * g1, rtol=1e-9, atol=1e-12)
    torch.testing.assert_close(centred_ranks(torch.tensor([3.0, -1.0, 7.0])), torch.tensor([0.0, -0.5, 0.5]))


def test_rank_shaped_es_is_a_descent_direction_on_average():
    system, policy, x0 = lq_problem()
    es = EvolutionStrategies(EstimatorSettings(name="es", pairs=8, rank_shaping=True))
    g = draws(es, system, policy, x0, 1, 300).mean(0)
    true = torch.from_numpy(closed_form_gradient(x0)).reshape(-1)
    assert float(g @ true / (g.norm() * true.norm())) > 0.95


class _Counting(DoubleIntegrator):
    """Counts simulated rows: every call of ``step`` adds its batch size (class-level, survives ``replace``)."""

    rows = [0]

    def step(self, x, u):
        _Counting.rows[0] += x.shape[0]
        return super().step(x, u)


@pytest.mark.parametrize("name", sorted(ESTIMATORS))
def test_simulator_steps_are_counted_honestly(name):
    system = _Counting()
    policy = make_policy(PolicySettings(hidden=(4,)), system)
    x0 = system.sample_initial(5, torch.Generator().manual_seed(0))
    settings = {"es": dict(pairs=3), "likelihood_ratio": dict(samples=2), "alpha_order": dict(samples=2),
                "terminal_value": dict(window=3)}
    est = make_estimator(EstimatorSettings(name=name, **settings.get(name, {})))
    before = [p.detach().clone() for p in policy.parameters()]
    _Counting.rows[0] = 0
    out = est.estimate(system, policy, x0, 7, torch.Generator().manual_seed(0))
    assert out.sim_steps == _Counting.rows[0] == est.steps_per_estimate(5, 7)
    assert all(torch.equal(a, b) for a, b in zip(before, policy.parameters()))  # the estimator changed nothing
    assert len(out.grads) == len(before) and all(g.shape == p.shape for g, p in zip(out.grads, before))


def test_es_evaluates_each_perturbation_on_its_own_models():
    """With one model per batch element (an ensemble: a ``(B,)`` mass), a single antithetic pair must equal
    ``(J(theta + s e) - J(theta - s e)) e / (2 s)`` computed with two ordinary rollouts."""
    torch.manual_seed(0)
    system = envs.build("double_integrator").replace(params=envs.system_class("double_integrator").Params(
        mass=torch.tensor([0.5, 1.0, 2.0, 4.0], dtype=F64)))
    policy = make_policy(PolicySettings(hidden=(4,)), system, dtype=F64)
    x0 = system.sample_initial(4, torch.Generator().manual_seed(1), F64)
    es = EvolutionStrategies(EstimatorSettings(name="es", pairs=1, sigma=0.1))
    got = flat(es.estimate(system, policy, x0, 10, torch.Generator().manual_seed(2)).grads)
    theta = torch.nn.utils.parameters_to_vector(policy.parameters()).detach()
    e = torch.randn(1, theta.numel(), generator=torch.Generator().manual_seed(2), dtype=F64)[0]
    costs = []
    for sign in (1, -1):
        torch.nn.utils.vector_to_parameters(theta + sign * 0.1 * e, policy.parameters())
        with torch.no_grad():
            costs.append(rollout(system, policy, x0, 10).total_cost.mean())
    torch.nn.utils.vector_to_parameters(theta, policy.parameters())
    torch.testing.assert_close(got, (costs[0] - costs[1]) * e / 0.2, rtol=1e-10, atol=1e-12)


def test_settings_are_checked_at_the_door():
    with pytest.raises(ValueError, match="alpha_order, analytic, es, likelihood_ratio"):
        EstimatorSettings(name="reinforce")
    with pytest.raises(ValueError, match="samples >= 2"):
        EstimatorSettings(name="likelihood_ratio", samples=1)
    with pytest.raises(ValueError, match="alpha must be in"):
        EstimatorSettings(name="alpha_order", alpha=1.5)
    with pytest.raises(ValueError, match="sigma must be > 0"):
        EstimatorSettings(name="es", sigma=0.0)
    with pytest.warns(UserWarning, match="estimator.pairs is ignored by estimator.name=likelihood_ratio"):
        make_estimator(EstimatorSettings(name="likelihood_ratio", pairs=4))


@pytest.mark.parametrize("name", sorted(p.stem for p in (Path(CONFIG_DIR) / "estimator").glob("*.yaml")))
def test_every_estimator_config_trains_through_apg_train(tmp_path, name):
    """``apg-train estimator=<name>`` composes into valid records and runs the trainer (two tiny iterations)."""
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        cfg = compose(config_name="train", overrides=[f"estimator={name}", "train.iterations=2", "train.batch_size=4",
                                                      "train.horizon=5", "train.eval_batch=8", "train.figure_every=0"])
    record = config.build_train(cfg).record
    estimator = make_estimator(record.update)
    result = train_record(record, tmp_path)
    assert result.metrics["iterations"] == 2
    assert result.metrics["env_steps"] == 2 * estimator.steps_per_estimate(4, 5)
