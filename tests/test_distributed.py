"""Data-parallel training on two processes (gloo over loopback) against single-process training.

The reference is the same computation in one process at the same global batch: the all-reduced gradient must
equal the single-process minibatch gradient, and a few iterations of ``train`` (uneven split, running
normaliser, model ensemble, resume from rank 0's checkpoint) must leave the same parameters.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest
import torch
import torch.multiprocessing as mp
from hydra import compose, initialize_config_dir

import envs
from apg import Analytic, OptimSettings, PolicySettings, TrainSettings, make_policy, train
from apg.cli import config
from apg import distributed
from apg.checkpoint import load_checkpoint
from apg.cli.train import CONFIG_DIR
from apg.distributed import Shard
from apg.ensemble import ParameterRanges
from apg.estimators import make_estimator
from apg.train import Monitor, train_record

BATCH, HORIZON = 15, 12  # 15 = 8 + 7: an uneven split, so the weighting by share size matters
POLICY = PolicySettings(hidden=(16,), normalise="running")  # running statistics: rollouts must be gathered
OPTIM = OptimSettings(lr=1e-2, schedule="constant")  # constant: a resumed run may change train.iterations
ENSEMBLE = ParameterRanges.from_mapping({"mass": [0.8, 1.2]})  # per-element models: they must be sliced too
LOOPBACK = {"MASTER_ADDR": "127.0.0.1", "GLOO_SOCKET_IFNAME": "lo"}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _problem(dtype):
    system = envs.build("cartpole")
    torch.manual_seed(0)  # the layers' initial weights come from the global generator
    policy = make_policy(PolicySettings(hidden=(16,)), system, torch.Generator().manual_seed(0), dtype=dtype)
    x0 = system.sample_initial(BATCH, torch.Generator().manual_seed(1), dtype)
    return system, policy, x0


def _settings(iterations):
    return TrainSettings(iterations=iterations, batch_size=BATCH, horizon=HORIZON, eval_every=2, eval_batch=32,
                         checkpoint_every=100, figure_every=0, dtype="float64")


def _train(run_dir, iterations, resume=False, shard=None, monitors=()):
    return train(envs.build("pendulum"), POLICY, OPTIM, Analytic(), _settings(iterations), seed=5, run_dir=run_dir,
                 resume=resume, monitors=monitors,
                 ensemble=ENSEMBLE, shard=shard)


class _Count(Monitor):
    def __init__(self):
        self.calls = 0

    def start(self, run):
        self.calls += 1

    def iteration(self, it, stats):
        self.calls += 1

    def evaluation(self, it, result):
        self.calls += 1


def _worker(rank: int, world: int, port: int, out: str) -> None:
    os.environ.update(LOOPBACK, MASTER_PORT=str(port), RANK=str(rank), WORLD_SIZE=str(world))
    torch.set_num_threads(1)
    shard = distributed.from_environment(timeout_s=120)
    out_dir = Path(out)
    try:
        grads = {}
        for name, dtype in (("float32", torch.float32), ("float64", torch.float64)):
            system, policy, x0 = _problem(dtype)
            mine = shard.take(x0)
            est = Analytic().estimate(system, policy, mine, HORIZON, torch.Generator())
            grads[name] = distributed.reduce_gradient(est.grads, est.loss, est.sim_steps, mine.shape[0], BATCH, shard)
        # Each rank gets its own run directory: only rank 0's may come into existence.
        count = _Count()
        _train(out_dir / f"run{rank}", 3, shard=shard, monitors=[count])
        result = _train(out_dir / f"run{rank}", 5, resume=True, shard=shard, monitors=[count])
        torch.save({"grads": grads, "policy": result.policy.state_dict(), "metrics": result.metrics,
                    "monitor_calls": count.calls}, out_dir / f"rank{rank}.pt")
    except BaseException:
        distributed.shutdown(shard, wait=False)
        raise
    distributed.shutdown(shard)


@pytest.fixture(scope="module")
def two_ranks(tmp_path_factory):
    out = tmp_path_factory.mktemp("dp")
    mp.spawn(_worker, args=(2, _free_port(), str(out)), nprocs=2, join=True)
    return out, [torch.load(out / f"rank{r}.pt", weights_only=False) for r in range(2)]


@pytest.mark.parametrize("dtype, tol", [
    # One reduction in float64 of two partial means against one mean over 15 rows: the only difference is
    # the order of summation, so a few ulps of the result's precision (float32 eps 1.2e-7, float64 2.2e-16).
    (torch.float32, dict(rtol=1e-5, atol=1e-6)),
    (torch.float64, dict(rtol=1e-12, atol=1e-13)),
])
def test_all_reduced_gradient_equals_the_single_process_gradient(two_ranks, dtype, tol):
    _, results = two_ranks
    system, policy, x0 = _problem(dtype)
    reference = Analytic().estimate(system, policy, x0, HORIZON, torch.Generator())
    name = str(dtype).removeprefix("torch.")
    for r in results:
        grads, loss, steps = r["grads"][name]
        assert steps == BATCH * HORIZON
        torch.testing.assert_close(loss, reference.loss, **tol)
        for g, ref in zip(grads, reference.grads):
            assert g.dtype == ref.dtype
            torch.testing.assert_close(g, ref, **tol)


@pytest.mark.filterwarnings("ignore:train.iterations differs")
def test_parameters_after_data_parallel_training_match_one_process(two_ranks, tmp_path):
    out, results = two_ranks
    # Reference: 3 iterations, then resumed to 5, in one process (resumption is exact there; test_training).
    _train(tmp_path, 3)
    single = _train(tmp_path, 5, resume=True)
    expected = single.policy.state_dict()
    for r in results:
        for k, v in expected.items():
            # float64 throughout; the per-iteration difference is summation order (1e-16 relative), which five
            # Adam steps and the running normaliser carry along without amplifying past 1e-10.
            torch.testing.assert_close(r["policy"][k], v, rtol=1e-10, atol=1e-12, msg=k)
    assert results[0]["metrics"] == results[1]["metrics"]  # rank 1 reports rank 0's metrics
    for key in ("eval_cost", "success_rate"):
        assert results[0]["metrics"][key] == pytest.approx(single.metrics[key], rel=1e-9)
    assert results[0]["metrics"]["env_steps"] == single.metrics["env_steps"] == 5 * BATCH * HORIZON
    assert results[0]["metrics"]["processes"] == 2


def test_only_rank_zero_writes_and_reports(two_ranks):
    out, results = two_ranks
    assert not (out / "run1").exists()  # rank 1 wrote nothing, not even the directory
    for name in ("checkpoint.pt", "metrics.json", "config.yaml"):
        assert (out / "run0" / name).exists(), name
    assert load_checkpoint(out / "run0")["iteration"] == 5
    assert results[1]["monitor_calls"] == 0 and results[0]["monitor_calls"] > 0


def test_shards_cover_the_minibatch_exactly_once():
    for n, world in [(15, 2), (7, 3), (4, 4), (1000, 7)]:
        rows = [range(*Shard(r, world).bounds(n)) for r in range(world)]
        assert [i for part in rows for i in part] == list(range(n))
        assert max(map(len, rows)) - min(map(len, rows)) <= 1
    with pytest.raises(ValueError, match="rank"):
        Shard(2, 2)


def test_torchrun_training_matches_a_single_process_run(tmp_path):
    """``torchrun`` end to end: 2 processes on loopback write one run whose result is the 1-process result."""
    tiny = ["train.iterations=3", "train.batch_size=9", "train.horizon=10", "train.eval_every=1", "train.eval_batch=16",
            "train.figure_every=0", "train.dtype=float64", "progress=false"]
    env = {**os.environ, **LOOPBACK, "HYDRA_FULL_ERROR": "0", "OMP_NUM_THREADS": "1"}
    port = str(_free_port())
    launch = [sys.executable, "-m", "torch.distributed.run", "--nnodes=1", "--nproc-per-node=2",
              "--master-addr=127.0.0.1", f"--master-port={port}", "-m", "apg.cli.train"]
    dp = subprocess.run([*launch, *tiny, f"hydra.run.dir={tmp_path / 'dp'}"], cwd=tmp_path, env=env,
                        capture_output=True, text=True, timeout=300)
    assert dp.returncode == 0, dp.stderr[-3000:]
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):  # the same config, in this process
        record = config.build_train(compose(config_name="train", overrides=tiny)).record
    train_record(record, tmp_path / "one")
    m_dp, m_one = (json.loads((tmp_path / d / "metrics.json").read_text()) for d in ("dp", "one"))
    assert m_dp["processes"] == 2 and m_dp["env_steps"] == m_one["env_steps"] == 3 * 9 * 10
    # float64; summation order only (see above).
    assert m_dp["eval_cost"] == pytest.approx(m_one["eval_cost"], rel=1e-9)
    p_dp, p_one = (load_checkpoint(tmp_path / d)["policy"] for d in ("dp", "one"))
    for k in p_one:
        torch.testing.assert_close(p_dp[k], p_one[k], rtol=1e-10, atol=1e-12, msg=k)
    assert "split over 2 processes" in (tmp_path / "dp" / "train.log").read_text()
    assert (tmp_path / "dp" / "train.rank1.log").exists()  # rank 1's log lines do not interleave with rank 0's
