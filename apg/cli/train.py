"""``apg-train``: compose the config, build the records, train, and report where the results are.

Launched by ``torchrun`` (``torchrun --nproc-per-node N -m apg.cli.train ...``) it trains data-parallel over the
N processes (:mod:`apg.distributed`); rank 0 writes the run directory.
"""

from __future__ import annotations

import logging
import sys
import textwrap
from pathlib import Path

import hydra
import torch
from hydra.core.hydra_config import HydraConfig
from omegaconf import DictConfig, OmegaConf

from apg import config as app_config  # registers the schemas
from apg import distributed
from apg.checkpoint import CheckpointError
from apg.estimators import make_estimator
from apg.monitor import ProgressMonitor, TensorBoardMonitor
from apg.trainer import NonFiniteError, RunExistsError, train

CONFIG_DIR = str(Path(__file__).resolve().parents[2] / "configs")
log = logging.getLogger("apg.train")


def choices(group: str, indent: int = 2) -> str:
    """The YAML files of a config group, comma-separated and wrapped under a help line indented ``indent``
    spaces: what ``--help`` offers (Hydra's stored ``schema*`` entries are not choices)."""
    names = sorted(p.stem for p in (Path(CONFIG_DIR) / group).glob("*.yaml"))
    return textwrap.fill(", ".join(names), width=116 - indent, subsequent_indent=" " * indent, break_on_hyphens=False)


OmegaConf.register_new_resolver("apg_train_choices", choices, replace=True)


def run(cfg: DictConfig) -> dict:
    """Train from a composed config; returns the final metrics (also written to ``metrics.json``)."""
    spec = app_config.build(cfg)
    torch.set_num_threads(spec.threads)
    run_dir = Path(HydraConfig.get().runtime.output_dir)
    shard = distributed.from_environment()
    if shard.parallel and shard.main:
        log.info("data-parallel training: the minibatch of %d initial states is split over %d processes",
                 spec.train.batch_size, shard.world_size)
    try:
        result = train(spec.system, spec.policy, spec.optim, make_estimator(spec.estimator), spec.train,
                       seed=spec.seed, run_dir=run_dir, resume=spec.resume, config=spec.config,
                       monitors=[TensorBoardMonitor(), ProgressMonitor(spec.progress)], ensemble=spec.ensemble,
                       shard=shard)
    except BaseException:
        distributed.shutdown(shard, wait=False)
        raise
    distributed.shutdown(shard)
    m = result.metrics
    if not shard.main:
        return m
    log.info("%s: held-out cost %.4g, success %.1f%% (%s) after %d iterations, %.1f s; run directory %s",
             m["system"], m["eval_cost"], 100 * m["success_rate"], m["success_criterion"], m["iterations"],
             m["wall_time_s"], run_dir)
    return m


@hydra.main(version_base="1.3", config_path=CONFIG_DIR, config_name="train")
def main(cfg: DictConfig) -> None:
    try:
        run(cfg)
    except (ValueError, RunExistsError, NonFiniteError, CheckpointError) as e:
        log.error("%s", e)
        sys.exit(2)
    except KeyboardInterrupt:
        sys.exit(130)  # the trainer has saved a checkpoint and said where


if __name__ == "__main__":
    # Run the imported module's main, not this __main__ copy: launchers that pickle the task function
    # (submitit, joblib) can then pickle it by reference instead of dragging __main__'s globals along.
    from apg.cli.train import main as imported_main

    imported_main()
