"""Rerun the presets in configs/experiment/ and print the README's systems table rows.

Each preset trains through the same code path as ``apg-train`` (a subprocess of ``python -m apg.cli.train``), and
its row is read from the run's ``metrics.json``: preset, system, seed, held-out success, held-out cost,
iterations and wall seconds, with a note when held-out success falls short of 95 %. ``--ensembles`` also trains
each ensemble preset's nominal twin (the same settings, its ``system.ensemble`` ranges deleted) and runs ``python -m apg.cli.eval``
on the pair, reporting the parameter range over which each holds >= 90 % success (the README's ensemble table).

    python benchmarks/systems_table.py --only hollowmere_arm_upright larkspur_gymnast_pump_up --seeds 0 1 2
    python benchmarks/systems_table.py --only brackwater_container_move_any_load --ensembles --json table.json

Runs go to ``--runs/<preset>_<seed>``; a directory that already holds a finished run (``metrics.json``) is read
instead of retrained with ``--reuse``, and refused otherwise (apg-train never overwrites a run).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
PRESETS = sorted(p.stem for p in (ROOT / "configs" / "experiment").glob("*.yaml"))
TARGET = 0.95  # the README's bar for a solved preset
HOLD = 0.9  # apg-eval's robustness.hold: a parameter value holds when success >= this

# Ensemble presets: the parameter sweeps the README's ensemble table reports (unit of each in envs/<system>.py).
ENSEMBLE_SWEEPS = {
    "brackwater_container_move_any_load": {"load_mass": (2000.0, 30000.0), "rope_length": (3.0, 20.0)},
    "cobblefen_drone_hover_payloads": {"mass": (0.4, 1.5), "inertia": (0.003, 0.03)},
}


def _python(module: str, *args: str, log: Path) -> float:
    """Run ``python -m module args`` from the repository root with one torch thread; returns wall seconds.

    Raises:
        RuntimeError: the command failed; the message names the log holding its output.
    """
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""),
           "OMP_NUM_THREADS": "1"}
    start = time.perf_counter()
    with log.open("w") as out:
        done = subprocess.run([sys.executable, "-m", module, *args], cwd=ROOT, env=env, stdout=out,
                              stderr=subprocess.STDOUT)
    if done.returncode != 0:
        raise RuntimeError(f"python -m {module} {' '.join(args)} failed (exit {done.returncode}); see {log}")
    return time.perf_counter() - start


def train(preset: str, seed: int, run_dir: Path, reuse: bool, extra: tuple[str, ...] = ()) -> dict:
    """One preset and seed through apg-train's code path; returns its table row."""
    metrics_file = run_dir / "metrics.json"
    wall = None
    if not (reuse and metrics_file.exists()):
        run_dir.parent.mkdir(parents=True, exist_ok=True)
        wall = _python("apg.cli.train", f"+experiment={preset}", f"seed={seed}", f"hydra.run.dir={run_dir}",
                       "progress=false", *extra, log=run_dir.parent / f"{run_dir.name}.log")
    m = json.loads(metrics_file.read_text())
    row = {"preset": preset, "system": m["system"], "seed": seed, "success": m["success_rate"],
           "cost": m["eval_cost"], "iterations": m["iterations"], "train_seconds": m["wall_time_s"],
           "wall_seconds": wall, "run_dir": str(run_dir), "reused": wall is None}
    row["note"] = "" if m["success_rate"] >= TARGET else f"below {TARGET:.0%}"
    return row


def ensemble_ranges(preset: str, seed: int, runs: Path, reuse: bool) -> dict:
    """Train the preset's nominal twin, run apg-eval on the pair and return the held ranges per parameter."""
    nominal = runs / f"{preset}_nominal_{seed}"
    # Delete each ensemble range (Hydra's ~key): "system.ensemble={}" would merge into the preset's and change nothing.
    ranges = yaml.safe_load((ROOT / "configs" / "experiment" / f"{preset}.yaml").read_text())["system"]["ensemble"]
    train(preset, seed, nominal, reuse, extra=tuple(f"~system.ensemble.{name}" for name in ranges))
    ensemble = runs / f"{preset}_{seed}"
    output = runs / f"{preset}_{seed}_vs_nominal"
    sweeps = [f"+eval.robustness.params.{name}=[{low},{high}]" for name, (low, high) in ENSEMBLE_SWEEPS[preset].items()]
    if not (reuse and (output / "evaluation.json").exists()):
        _python("apg.cli.eval", f"source={ensemble}", f"against=[{nominal}]", "labels=[ensemble,nominal]", *sweeps,
                "eval.robustness.points=15", "eval.animation=false", f"output={output}",
                log=runs / f"{output.name}.log")
    numbers = json.loads((output / "evaluation.json").read_text())
    held = {}
    for label, curves in numbers["robustness"].items():
        for c in curves:
            name = c["axis"].removeprefix("param:")
            if c["axis"].startswith("param:") or c["axis"] == "actuator_gain":
                held.setdefault(name, {})[label] = c["held"]
    return {"preset": preset, "seed": seed, "hold": HOLD, "held": held, "report": str(output / "report.md")}


def _fmt_range(r) -> str:
    return "none (fails at nominal)" if r is None else f"{r[0]:.4g}-{r[1]:.4g}"


def markdown(rows: list[dict], ranges: list[dict]) -> str:
    lines = ["| preset | system | seed | held-out success | held-out cost | iterations | wall s | note |",
             "| --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        wall = f"{r['wall_seconds']:.0f}" if r["wall_seconds"] is not None else f"{r['train_seconds']:.0f} (training, reused run)"
        lines.append(f"| `{r['preset']}` | `{r['system']}` | {r['seed']} | {100 * r['success']:.1f} % | {r['cost']:.4g} | "
                     f"{r['iterations']} | {wall} | {r['note']} |")
    for e in ranges:
        lines += ["", f"`{e['preset']}` (seed {e['seed']}): range where success stays >= {e['hold']:.0%}", "",
                  "| parameter | ensemble | nominal |", "| --- | --- | --- |"]
        for name, by_label in e["held"].items():
            lines.append(f"| {name} | {_fmt_range(by_label.get('ensemble'))} | {_fmt_range(by_label.get('nominal'))} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="+", default=PRESETS, metavar="NAME", help="presets to run (default: all)")
    ap.add_argument("--seeds", nargs="+", type=int, default=[0], metavar="S")
    ap.add_argument("--runs", type=Path, default=ROOT / "runs" / "systems_table", help="where the runs go")
    ap.add_argument("--reuse", action="store_true", help="read finished runs in --runs instead of retraining")
    ap.add_argument("--ensembles", action="store_true",
                    help=f"for the ensemble presets ({', '.join(ENSEMBLE_SWEEPS)}) also measure the held ranges")
    ap.add_argument("--json", type=Path, metavar="PATH", help="also write the rows as JSON")
    args = ap.parse_args(argv)
    unknown = sorted(set(args.only) - set(PRESETS))
    if unknown:
        ap.error(f"--only: no preset named {', '.join(unknown)}; the presets are {', '.join(PRESETS)}")
    rows, ranges = [], []
    for preset in args.only:
        for seed in args.seeds:
            rows.append(train(preset, seed, args.runs / f"{preset}_{seed}", args.reuse))
            print(markdown(rows[-1:], []).splitlines()[-1], flush=True)
            if args.ensembles and preset in ENSEMBLE_SWEEPS:
                ranges.append(ensemble_ranges(preset, seed, args.runs, args.reuse))
    print()
    print(markdown(rows, ranges))
    if args.json:
        args.json.write_text(json.dumps({"rows": rows, "ensemble_ranges": ranges}, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
