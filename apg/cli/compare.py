"""``apg-compare``: compose the config, build the records, run the gradient study and the race, write the report."""

from __future__ import annotations

import hashlib
import json
import logging
import platform
import sys
from pathlib import Path

import hydra
import torch
import yaml
from hydra.core.hydra_config import HydraConfig
from omegaconf import DictConfig

from apg.checkpoint import CheckpointError, atomic_write_text
from apg.cli import config  # registers the schemas
from apg.compare import gradient_study, run_race
from apg.monitor import ProgressMonitor, TensorBoardMonitor
from apg.policies import make_policy
from apg.reports.compare_report import FILES, summary_table, write_outputs
from apg.runs import DTYPES, RunExistsError, SystemSpec, load_run

CONFIG_DIR = str(Path(__file__).resolve().parents[2] / "configs")
log = logging.getLogger("apg.compare")


def run(cfg: DictConfig) -> list[dict] | None:
    """Run what the config enables; returns the race summary rows (also in ``race_summary.csv``)."""
    spec = config.build_compare(cfg)
    torch.set_num_threads(spec.threads)
    out = Path(HydraConfig.get().runtime.output_dir)
    if (out / FILES["report"]).exists() or (out / "race").exists():
        raise RunExistsError(f"{out} already holds an apg-compare run; choose another directory "
                             f"(hydra.run.dir=...). Nothing was changed.")
    out.mkdir(parents=True, exist_ok=True)
    atomic_write_text(out / "config.yaml", yaml.safe_dump(spec.config, sort_keys=False))
    notes = [f"System: `{spec.system.name}` (dt {spec.system.dt} s, {spec.system.integrator}); policy "
             f"{spec.policy.kind} {list(spec.policy.hidden) if spec.policy.kind == 'mlp' else ''}; config digest "
             f"`{hashlib.sha256(json.dumps(spec.config, sort_keys=True, default=str).encode()).hexdigest()[:16]}`" + (f"; experiment `{spec.config['experiment']}`"
                                                 if spec.config.get("experiment") else ""),
             f"Machine: {platform.processor() or platform.machine()}, torch {torch.__version__}, "
             f"{spec.threads} intra-op thread(s); CPU only."]

    study_rows = None
    if spec.study.enabled:
        if spec.checkpoint:
            loaded = load_run(spec.checkpoint)
            if loaded.system.name != spec.system.name:
                raise ValueError(f"checkpoint={spec.checkpoint} trained {loaded.system.name!r}, but this comparison "
                                 f"is on {spec.system.name!r}; set system={loaded.system.name} or choose another run")
            policy, system = loaded.policy, loaded.system
            if SystemSpec.of(system) != SystemSpec.of(spec.system):
                log.warning("the study runs on the plant %s was trained on, not on the configured system (they "
                            "differ in parameters, task, dt or integrator)", spec.checkpoint)
            notes.append(f"Gradient study at the trained policy in `{spec.checkpoint}`, on the plant it was "
                         f"trained on.")
            study_rows = gradient_study(system, policy, spec.study_estimators, spec.study, seed=spec.seed,
                                        progress=log.info)
        else:
            policy = make_policy(spec.policy, spec.system, torch.Generator().manual_seed(spec.seed + 1),
                                 dtype=DTYPES[spec.study.dtype])
            notes.append(f"Gradient study at the initial policy of seed {spec.seed} (the trainer's initialisation).")
            study_rows = gradient_study(spec.system, policy, spec.study_estimators, spec.study, seed=spec.seed,
                                        progress=log.info)

    result = None
    if spec.race.enabled:
        result = run_race(spec.system, spec.policy, spec.entrants, spec.race, out,
                          monitors=lambda: [TensorBoardMonitor(), ProgressMonitor(spec.progress)],
                          progress=log.info)
    summary = write_outputs(out, spec.system.name, spec.system.success_criterion, study_rows, result, notes)
    if summary is not None:
        for budget in spec.race.budgets:
            print(f"\n{spec.system.name}: equal-{budget} race ({result.target_note})")
            print(summary_table(summary, budget))
    log.info("apg-compare: report %s", out / FILES["report"])
    return summary


@hydra.main(version_base="1.3", config_path=CONFIG_DIR, config_name="compare")
def main(cfg: DictConfig) -> None:
    try:
        run(cfg)
    except (ValueError, RunExistsError, CheckpointError) as e:
        log.error("%s", e)
        sys.exit(2)
    except KeyboardInterrupt:
        sys.exit(130)


if __name__ == "__main__":
    main()
