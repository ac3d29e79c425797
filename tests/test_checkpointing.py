"""Memory-bounded BPTT and the compiled step: the same gradients as the plain rollout, less saved memory.

The reference is the uncheckpointed, eager rollout of the same policy from the same states. Activation
checkpointing recomputes each window with the same operations in the same order, so its gradient agrees to
the last few ulps (exactly, in practice); a compiled step may fuse and reorder floating-point operations.
"""

from __future__ import annotations

import functools
import sys

import pytest
import torch

import envs
from apg import Analytic, OptimSettings, PolicySettings, TrainSettings, make_policy, rollout, train
from apg.ensemble import ParameterRanges
from apg.rollout import RolloutOptions, _step

ROLLOUT_MODULE = sys.modules["apg.rollout"]  # the name apg.rollout is the function, re-exported by apg

F64 = torch.float64
# Recomputation repeats the forward exactly, so only rounding-level differences are tolerable; 1e-12 relative
# is four orders above float64 eps (2.2e-16) and far below any missed gradient path (O(1) relative).
EXACT = dict(rtol=1e-12, atol=1e-14)


def _setup(name: str, batch: int = 6, ensemble: dict | None = None):
    system = envs.build(name)
    torch.manual_seed(0)
    policy = make_policy(PolicySettings(hidden=(16, 16)), system, torch.Generator().manual_seed(0), dtype=F64)
    x0 = system.sample_initial(batch, torch.Generator().manual_seed(1), F64)
    if ensemble:
        system = ParameterRanges.from_mapping(ensemble).sample(system, batch, torch.Generator().manual_seed(2), F64)
    return system, policy, x0


def _loss_and_grads(system, policy, x0, horizon, **options):
    traj = rollout(system, policy, x0, horizon, **options)
    loss = traj.total_cost.mean()
    return traj, torch.autograd.grad(loss, list(policy.parameters()))


@pytest.mark.parametrize("name, ensemble", [("cartpole", None), ("acrobot", None), ("quadrotor", None),
                                            ("crane", {"load_mass": [8000.0, 12000.0]})])
@pytest.mark.parametrize("window", [1, 7, 39])  # one step; a remainder window (40 = 5 x 7 + 5); all but one step
def test_checkpointed_rollout_has_the_plain_gradient(name, ensemble, window):
    system, policy, x0 = _setup(name, ensemble=ensemble)
    plain, g_plain = _loss_and_grads(system, policy, x0, 40)
    windowed, g_win = _loss_and_grads(system, policy, x0, 40, recompute_every=window)
    for field in ("states", "actions", "costs", "terminal"):
        torch.testing.assert_close(getattr(windowed, field), getattr(plain, field), **EXACT)
    for a, b in zip(g_win, g_plain):
        torch.testing.assert_close(a, b, **EXACT)


def _saved_bytes(fn) -> int:
    """Bytes of the tensors autograd keeps for the backward pass of ``fn()`` (outside checkpointed regions)."""
    total = 0

    def pack(t):
        nonlocal total
        total += t.numel() * t.element_size()
        return t

    with torch.autograd.graph.saved_tensors_hooks(pack, lambda t: t):
        fn()
    return total


def test_checkpointing_keeps_a_fraction_of_the_activations():
    system, policy, x0 = _setup("cartpole", batch=64)
    plain = _saved_bytes(lambda: rollout(system, policy, x0, 200).total_cost.mean())
    windowed = _saved_bytes(lambda: rollout(system, policy, x0, 200, recompute_every=14).total_cost.mean())
    # Without checkpointing every step keeps the MLP's and RK4's intermediates (hundreds of numbers per state);
    # with it only window boundaries and the trajectory itself remain: well under a tenth.
    assert windowed < plain / 10, (windowed, plain)


def test_no_grad_rollout_ignores_the_window():
    system, policy, x0 = _setup("cartpole")
    with torch.no_grad():
        a = rollout(system, policy, x0, 30)
        b = rollout(system, policy, x0, 30, recompute_every=4)
    torch.testing.assert_close(a.states, b.states, rtol=0, atol=0)


def _train(tmp_path, resume=False, **settings):
    s = TrainSettings(**{**dict(iterations=4, batch_size=8, horizon=30, eval_every=4, eval_batch=16, figure_every=0,
                                checkpoint_every=2, dtype="float64"), **settings})
    optim = OptimSettings(lr=1e-2, schedule="constant")  # constant: stopping at 2 of 4 and resuming is exact
    return train(envs.build("pendulum"), PolicySettings(hidden=(16,)), optim, Analytic(), s, seed=1,
                 run_dir=tmp_path, resume=resume)


def test_training_with_a_recompute_every_matches_plain_training(tmp_path):
    plain = _train(tmp_path / "plain")
    windowed = _train(tmp_path / "windowed", recompute_every=8)
    for k, v in plain.policy.state_dict().items():
        torch.testing.assert_close(windowed.policy.state_dict()[k], v, **EXACT, msg=k)


@pytest.mark.filterwarnings("ignore:train.iterations differs")
def test_a_run_may_resume_with_checkpointing_switched_on(tmp_path):
    """train.recompute_every changes memory, not results, so resuming with another value is allowed."""
    straight = _train(tmp_path / "straight")
    _train(tmp_path / "resumed", iterations=2)
    resumed = _train(tmp_path / "resumed", resume=True, recompute_every=8)
    for k, v in straight.policy.state_dict().items():
        torch.testing.assert_close(resumed.policy.state_dict()[k], v, **EXACT, msg=k)


def test_compiled_step_matches_eager(monkeypatch, tmp_path):
    """``compile_step`` reaches the rollout through the trainer and the estimator, and changes no result.

    The aot_eager backend traces the step with TorchDynamo and AOTAutograd exactly as the default (inductor)
    does, without generating C++ (which takes a minute on this machine); benchmarks/scaling.py times inductor.
    """
    from torch._dynamo.utils import counters

    torch._dynamo.reset()
    counters.clear()
    monkeypatch.setattr(ROLLOUT_MODULE, "_compiled_step",
                        functools.cache(lambda: torch.compile(_step, backend="aot_eager")))
    try:
        system, policy, x0 = _setup("cartpole")
        plain, g_plain = _loss_and_grads(system, policy, x0, 20)
        compiled, g_comp = _loss_and_grads(system, policy, x0, 20, compile=True, recompute_every=6)
        assert counters["stats"]["unique_graphs"] >= 1  # the step really went through torch.compile
        # Traced graphs may reorder float64 operations: rounding-level differences only.
        torch.testing.assert_close(compiled.total_cost, plain.total_cost, rtol=1e-10, atol=1e-12)
        for a, b in zip(g_comp, g_plain):
            torch.testing.assert_close(a, b, rtol=1e-10, atol=1e-12)
        before = counters["stats"]["unique_graphs"]
        eager = _train(tmp_path / "eager")
        fast = _train(tmp_path / "compiled", compile_step=True)
        assert counters["stats"]["unique_graphs"] > before
        for k, v in eager.policy.state_dict().items():
            torch.testing.assert_close(fast.policy.state_dict()[k], v, rtol=1e-9, atol=1e-11, msg=k)
    finally:
        torch._dynamo.reset()


def test_bad_window_is_named():
    with pytest.raises(ValueError, match="recompute_every"):
        TrainSettings(recompute_every=-1)
    with pytest.raises(ValueError, match="recompute_every"):
        RolloutOptions(recompute_every=-2)
    system, policy, x0 = _setup("cartpole")
    with pytest.raises(ValueError, match="recompute_every"):
        rollout(system, policy, x0, 5, recompute_every=-1)
