"""``apg-eval``: compose the config, evaluate a run or an exported file, write the report, say where it is."""

from __future__ import annotations

import logging
import sys
from pathlib import Path

import hydra
import torch
from omegaconf import DictConfig

from apg.checkpoint import CheckpointError
from apg.cli import config  # registers the schemas
from apg.export import PolicyFileError
from apg.report import run_report

CONFIG_DIR = str(Path(__file__).resolve().parents[2] / "configs")
log = logging.getLogger("apg.eval")


def _bar(enabled: bool):
    state: dict = {}

    def update(done: int, total: int, what: str) -> None:
        if not enabled:
            return
        if "bar" not in state or state["bar"].total != total or done == 1:
            from tqdm import tqdm

            if "bar" in state:
                state["bar"].close()
            state["bar"] = tqdm(total=total, desc="robustness", unit="pt", file=sys.stderr, dynamic_ncols=True)
        state["bar"].set_postfix_str(what, refresh=False)
        state["bar"].update(done - state["bar"].n)
        if done == total:
            state["bar"].close()
            del state["bar"]

    return update


def run(cfg: DictConfig) -> dict:
    """Evaluate from a composed config; returns the numbers (also in ``evaluation.json``)."""
    spec = config.build_eval(cfg)
    torch.set_num_threads(spec["threads"])
    numbers = run_report(spec["sources"], spec["output"], spec["settings"], labels=spec["labels"],
                         progress=_bar(spec["progress"]), say=log.info)
    ev = numbers["evaluation"]
    log.info("%s on %s: success %.1f%% (%s), mean cost %.4g; report %s/report.md", numbers["label"],
             numbers["system"], 100 * ev["success_rate"], numbers["success_criterion"], ev["cost"]["mean"],
             numbers["output"])
    return numbers


@hydra.main(version_base="1.3", config_path=CONFIG_DIR, config_name="eval")
def main(cfg: DictConfig) -> None:
    try:
        run(cfg)
    except (ValueError, CheckpointError, PolicyFileError) as e:
        log.error("%s", e)
        sys.exit(2)


if __name__ == "__main__":
    main()
