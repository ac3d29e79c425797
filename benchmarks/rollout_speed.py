"""Simulator steps per second for BPTT (rollout forward + backward) on the cart-pole with a 64x64 MLP policy.

For each batch size it also times the same MLP's forward + backward alone over the same number of steps, with
no physics: the bound a faster simulator could approach. Prints a table; ``--json PATH`` also saves it.

    python benchmarks/rollout_speed.py                 # batch 1024 and 4096, horizon 200, one thread
    python benchmarks/rollout_speed.py --batch 256 --horizon 100 --threads 2
"""

from __future__ import annotations

import argparse
import json
import platform
import time

import torch

import envs
from apg import PolicySettings, make_policy, rollout


def _best_of(fn, repeats: int) -> float:
    fn()  # warm-up: allocator and autograd caches
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def measure(batch: int, horizon: int, repeats: int) -> dict:
    torch.manual_seed(0)
    system = envs.build("cartpole")
    policy = make_policy(PolicySettings(hidden=(64, 64)), system)
    x0 = system.sample_initial(batch, torch.Generator().manual_seed(0))

    def bptt() -> None:
        policy.zero_grad(set_to_none=True)
        rollout(system, policy, x0, horizon).total_cost.mean().backward()

    obs = torch.randn(batch, system.obs_dim)

    def mlp_only() -> None:
        policy.zero_grad(set_to_none=True)
        total = torch.zeros(())
        for _ in range(horizon):
            total = total + policy(obs).square().mean()
        total.backward()

    steps = batch * horizon
    t_bptt = _best_of(bptt, repeats)
    t_mlp = _best_of(mlp_only, repeats)
    return {"batch": batch, "horizon": horizon, "bptt_s": t_bptt, "bptt_steps_per_s": steps / t_bptt,
            "mlp_only_s": t_mlp, "mlp_only_steps_per_s": steps / t_mlp, "ratio_to_mlp_bound": t_bptt / t_mlp}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--batch", type=int, nargs="+", default=[1024, 4096])
    ap.add_argument("--horizon", type=int, default=200)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--json", help="also write the results to this file")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    print(f"torch {torch.__version__}, {args.threads} thread(s), {platform.processor() or platform.machine()}, "
          f"cart-pole RK4, MLP 64x64 tanh, horizon {args.horizon}, best of {args.repeats}")
    print(f"{'batch':>6} {'BPTT s':>8} {'BPTT steps/s':>13} {'MLP-only s':>11} {'MLP steps/s':>12} {'BPTT/MLP':>9}")
    rows = []
    for b in args.batch:
        r = measure(b, args.horizon, args.repeats)
        rows.append(r)
        print(f"{b:>6} {r['bptt_s']:>8.3f} {r['bptt_steps_per_s']:>13,.0f} {r['mlp_only_s']:>11.3f} "
              f"{r['mlp_only_steps_per_s']:>12,.0f} {r['ratio_to_mlp_bound']:>8.2f}x")
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"threads": args.threads, "torch": torch.__version__, "rows": rows}, f, indent=2)


if __name__ == "__main__":
    main()
