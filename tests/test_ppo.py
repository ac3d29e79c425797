"""PPO baseline: advantage estimation against its closed forms, honest step counts, and a real (loose) learning check."""

from __future__ import annotations

import pytest
import torch

import envs
from apg import Analytic, OptimSettings, PolicySettings, TrainSettings, train
from apg.train import Monitor, RunExistsError
from apg.updates import PPOSettings, advantages

SMALL = PolicySettings(hidden=(32, 32))


def _returns(rewards, gamma):
    out, running = torch.zeros_like(rewards), torch.zeros_like(rewards[0])
    for t in reversed(range(rewards.shape[0])):
        running = rewards[t] + gamma * running
        out[t] = running
    return out


def test_gae_limits_match_their_closed_forms():
    """Schulman et al. (2016), eqs. 17-18: lambda = 0 gives the one-step TD error
    ``r_t + gamma V_{t+1} - V_t``; lambda = 1 gives the discounted return minus the value (Monte Carlo)."""
    g = torch.Generator().manual_seed(0)
    rewards, values = torch.randn(7, 3, generator=g, dtype=torch.float64), torch.randn(7, 3, generator=g, dtype=torch.float64)
    gamma = 0.9
    next_values = torch.cat([values[1:], torch.zeros(1, 3, dtype=torch.float64)])  # the episode ends after step 7
    adv0, target0 = advantages(rewards, values, gamma, 0.0)
    torch.testing.assert_close(adv0, rewards + gamma * next_values - values, rtol=1e-12, atol=1e-12)
    torch.testing.assert_close(target0, rewards + gamma * next_values, rtol=1e-12, atol=1e-12)
    adv1, target1 = advantages(rewards, values, gamma, 1.0)
    torch.testing.assert_close(adv1, _returns(rewards, gamma) - values, rtol=1e-12, atol=1e-12)
    torch.testing.assert_close(target1, _returns(rewards, gamma), rtol=1e-12, atol=1e-12)


class _Evals(Monitor):
    def __init__(self):
        self.costs, self.steps = [], []

    def iteration(self, it, stats):
        self.steps.append(stats["env_steps"])

    def evaluation(self, it, result):
        self.costs.append(result.mean_cost)


@pytest.mark.parametrize("seed", [0, 1])
def test_ppo_learns_to_balance_the_cartpole(tmp_path, seed):
    """A real learning check, loose on purpose: 20 iterations of 32 rollouts x 60 steps (38,400 simulator steps)
    must cut the held-out cost to a quarter of the initial policy's. Measured: to 2-7 % of it (~1.6 s a seed)."""
    evals = _Evals()
    result = train(envs.build("cartpole"), SMALL, OptimSettings(lr=3e-3, schedule="constant"),
                   PPOSettings(epochs=5, minibatches=4),
                   TrainSettings(iterations=20, batch_size=32, horizon=60, eval_every=20, eval_batch=128,
                                 grad_clip=0.5, figure_every=0),
                   seed=seed, run_dir=tmp_path, monitors=[evals])
    assert result.metrics["env_steps"] == 20 * 32 * 60 == evals.steps[-1]
    assert evals.costs[-1] < 0.25 * evals.costs[0], evals.costs


def test_ppo_starts_from_the_trainers_initial_policy_and_respects_the_step_budget(tmp_path):
    """Races compare methods from the same start: PPO's iteration-0 held-out cost equals the trainer's."""
    system = envs.build("pendulum")
    settings = TrainSettings(iterations=50, batch_size=8, horizon=10, eval_every=50, eval_batch=16, figure_every=0,
                             max_env_steps=200)
    ppo, bptt = _Evals(), _Evals()
    result = train(system, SMALL, OptimSettings(lr=1e-3), PPOSettings(epochs=1, minibatches=2), settings,
                   seed=4, run_dir=tmp_path / "ppo", monitors=[ppo])
    train(system, SMALL, OptimSettings(lr=1e-3), Analytic(), settings, seed=4, run_dir=tmp_path / "bptt",
          monitors=[bptt])
    assert ppo.costs[0] == bptt.costs[0]
    # 80 steps an iteration: a 200-step budget ends after the 3rd iteration (240 >= 200), as in the trainer.
    assert result.metrics["iterations"] == 3 and result.metrics["env_steps"] == 240
    with pytest.raises(RunExistsError, match="resume=true"):
        train(system, SMALL, OptimSettings(lr=1e-3), PPOSettings(), settings, seed=4, run_dir=tmp_path / "ppo")


class _Stop(Monitor):
    def __init__(self, at):
        self.at = at

    def iteration(self, it, stats):
        if it == self.at:
            raise RuntimeError("simulated crash")


def test_ppo_resumes_exactly(tmp_path):
    """PPO runs in the same loop as every method, so its critic, action noise, optimiser and random streams are
    checkpointed: a run crashed after iteration 5 and resumed ends bit-identical to one never stopped."""
    system = envs.build("cartpole")
    settings = TrainSettings(iterations=8, batch_size=8, horizon=20, eval_every=4, eval_batch=16, figure_every=0,
                             checkpoint_every=4)
    optim = OptimSettings(lr=1e-3, schedule="constant")
    straight = train(system, SMALL, optim, PPOSettings(epochs=2, minibatches=2), settings, seed=2,
                     run_dir=tmp_path / "a")
    with pytest.raises(RuntimeError, match="simulated"):
        train(system, SMALL, optim, PPOSettings(epochs=2, minibatches=2), settings, seed=2, run_dir=tmp_path / "b",
              monitors=[_Stop(6)])
    resumed = train(system, SMALL, optim, PPOSettings(epochs=2, minibatches=2), settings, seed=2,
                    run_dir=tmp_path / "b", resume=True)
    for k, v in straight.policy.state_dict().items():
        assert torch.equal(v, resumed.policy.state_dict()[k]), k
    assert resumed.metrics["eval_cost"] == straight.metrics["eval_cost"]


def test_bad_ppo_settings_are_named():
    with pytest.raises(ValueError, match="gamma must be in"):
        PPOSettings(gamma=1.5)
    with pytest.raises(ValueError, match="clip_ratio must be > 0"):
        PPOSettings(clip_ratio=0.0)


def test_ppo_refuses_the_gradient_trainers_schedules(tmp_path):
    settings = TrainSettings(iterations=2, batch_size=4, horizon=10, eval_batch=4, horizon_start=5)
    with pytest.raises(ValueError, match="horizon_start"):
        train(envs.build("pendulum"), SMALL, OptimSettings(), PPOSettings(), settings, seed=0, run_dir=tmp_path)
    assert not (tmp_path / "checkpoint.pt").exists()
