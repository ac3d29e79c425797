"""BPTT speed and peak memory against batch size and horizon: eager vs compiled, with and without checkpointing.

Same workload as ``rollout_speed.py`` (cart-pole, RK4, 64x64 tanh MLP, float32, forward + backward of the mean
rollout cost) and the same bare-MLP bound: the MLP's forward + backward alone over the same number of steps, no
physics (``rollout_speed.measure``'s ``mlp_only`` loop, repeated here so that each configuration and its bound
are timed in one process, alternately: on shared cores the load drifts between processes).

Every configuration runs in a fresh subprocess, one after another, so that no measurement inherits another's
memory (only inductor's on-disk cache is shared, which shortens later compilations: see ``warm-up s``). Peak
memory is the process's resident-set high-water mark (``VmHWM`` in ``/proc/self/status``; tracemalloc does not
see torch's CPU allocations). Each child sets up, warms up (a rollout of window + 2 steps, which compiles the
step when compiling), resets the mark (``echo 5 > /proc/self/clear_refs``), runs one full forward + backward and
reports the mark (``peak MB``) and its rise above the RSS at the reset (``BPTT MB``: the memory one training
step needs). Then it times ``--repeats`` more runs and keeps the best.

    python benchmarks/scaling.py                    # the default grid below, a few minutes on 2 cores
    python benchmarks/scaling.py --points 4096x100 1024x800 --repeats 3 --json scaling.json
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

DEFAULT_POINTS = ["256x100", "1024x100", "4096x100", "1024x800"]


def _status_kb(field: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/self/status")


def _child(spec: dict) -> dict:
    """One configuration, in this (fresh) process."""
    import torch

    import envs
    from apg import PolicySettings, make_policy, rollout

    torch.set_num_threads(spec["threads"])
    torch.manual_seed(0)
    system = envs.build("cartpole")
    policy = make_policy(PolicySettings(hidden=(64, 64)), system)
    x0 = system.sample_initial(spec["batch"], torch.Generator().manual_seed(0))
    options = dict(recompute_every=spec["window"], compile=spec["compile"])

    def bptt(horizon: int) -> None:
        policy.zero_grad(set_to_none=True)
        rollout(system, policy, x0, horizon, **options).total_cost.mean().backward()

    obs = torch.randn(spec["batch"], system.obs_dim)

    def mlp_only() -> None:  # as in rollout_speed.measure
        policy.zero_grad(set_to_none=True)
        total = torch.zeros(())
        for _ in range(spec["horizon"]):
            total = total + policy(obs).square().mean()
        total.backward()

    def timed(fn, *args) -> float:
        t0 = time.perf_counter()
        fn(*args)
        return time.perf_counter() - t0

    t0 = time.perf_counter()
    # Warm-up, long enough to pass through checkpointing's first use too; compiles the step when compiling.
    bptt(min(spec["horizon"], spec["window"] + 2))
    warmup_s = time.perf_counter() - t0
    Path("/proc/self/clear_refs").write_text("5")  # reset VmHWM to the current RSS
    base_kb = _status_kb("VmRSS")
    times = [timed(bptt, spec["horizon"])]
    peak_kb = _status_kb("VmHWM")
    mlp_only()  # warm-up
    mlp_times = [timed(mlp_only)]
    for _ in range(spec["repeats"]):
        times.append(timed(bptt, spec["horizon"]))
        mlp_times.append(timed(mlp_only))
    return {**spec, "seconds": min(times), "mlp_only_s": min(mlp_times), "warmup_s": warmup_s,
            "peak_mb": peak_kb / 1024, "bptt_mb": (peak_kb - base_kb) / 1024}


def _run_child(spec: dict) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", json.dumps(spec)], capture_output=True, text=True,
                         env={**os.environ, "OMP_NUM_THREADS": str(spec["threads"])})
    if out.returncode != 0:
        raise RuntimeError(f"configuration {spec} failed:\n{out.stderr[-3000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def _point(text: str) -> tuple[int, int]:
    try:
        b, h = text.lower().split("x")
        return int(b), int(h)
    except ValueError:
        raise argparse.ArgumentTypeError(f"a point is BATCHxHORIZON, e.g. 1024x200; got {text!r}") from None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=_point, nargs="+", default=[_point(p) for p in DEFAULT_POINTS],
                    help=f"BATCHxHORIZON pairs (default {' '.join(DEFAULT_POINTS)})")
    ap.add_argument("--window", type=int, default=0,
                    help="checkpointing window in steps (default: round(sqrt(horizon)), the O(sqrt T) choice)")
    ap.add_argument("--modes", nargs="+", choices=["eager", "compiled"], default=["eager", "compiled"])
    ap.add_argument("--repeats", type=int, default=2, help="timed runs after the measured one; best of all")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--json", help="also write the results to this file")
    args = ap.parse_args()

    import torch

    print(f"torch {torch.__version__}, {args.threads} thread(s), {platform.processor() or platform.machine()}, "
          f"CPU only; cart-pole RK4, MLP 64x64 tanh, float32; best of {args.repeats + 1}; one subprocess each")
    head = (f"{'batch':>6} {'horizon':>7} {'mode':>8} {'window':>6} {'s/iter':>8} {'steps/s':>11} {'/MLP':>6} "
            f"{'peak MB':>8} {'BPTT MB':>8} {'warm-up s':>9} {'MLP s':>7}")
    print(f"load average before: {' '.join(f'{v:.1f}' for v in os.getloadavg())} on {os.cpu_count()} cores "
          f"(other processes share them: compare within a row group, not across runs)")
    print(head, flush=True)
    rows = []
    for batch, horizon in args.points:
        common = {"batch": batch, "horizon": horizon, "repeats": args.repeats, "threads": args.threads}
        window = args.window or max(1, round(math.sqrt(horizon)))
        for mode in args.modes:
            for w in (0, window):
                r = _run_child({**common, "window": w, "compile": mode == "compiled"})
                r["mode"] = mode
                r["steps_per_s"] = batch * horizon / r["seconds"]
                r["ratio_to_mlp_bound"] = r["seconds"] / r["mlp_only_s"]
                rows.append(r)
                print(f"{batch:>6} {horizon:>7} {mode:>8} {w or '-':>6} {r['seconds']:>8.3f} "
                      f"{r['steps_per_s']:>11,.0f} {r['ratio_to_mlp_bound']:>5.2f}x {r['peak_mb']:>8.0f} "
                      f"{r['bptt_mb']:>8.1f} {r['warmup_s']:>9.1f} {r['mlp_only_s']:>7.3f}", flush=True)

    print("\ncheckpointing against the same configuration without it (memory = BPTT MB ratio):")
    for r in rows:
        if r["window"]:
            plain = next(p for p in rows if p["window"] == 0 and p["mode"] == r["mode"]
                         and (p["batch"], p["horizon"]) == (r["batch"], r["horizon"]))
            print(f"  batch {r['batch']}, horizon {r['horizon']}, {r['mode']}, window {r['window']}: memory "
                  f"{r['bptt_mb'] / max(plain['bptt_mb'], 1e-9):.2f}x, time {r['seconds'] / plain['seconds']:.2f}x")
    print(f"load average after: {' '.join(f'{v:.1f}' for v in os.getloadavg())}")
    if args.json:
        with open(args.json, "w") as f:
            json.dump({"threads": args.threads, "torch": torch.__version__, "rows": rows}, f, indent=2)


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        print(json.dumps(_child(json.loads(sys.argv[2]))))
    else:
        main()
