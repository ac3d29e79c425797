"""``apg-export``: compose the config, export the run's policy to a verified ONNX file, say where it went."""

from __future__ import annotations

import logging
import sys
from pathlib import Path

import hydra
import torch
from omegaconf import DictConfig

from apg.checkpoint import CheckpointError
from apg.cli import config  # registers the schemas
from apg.export import PolicyFileError, VerificationError, export

CONFIG_DIR = str(Path(__file__).resolve().parents[2] / "configs")
log = logging.getLogger("apg.export")


def run(cfg: DictConfig) -> dict:
    """Export from a composed config; returns the verification record (also written beside the file)."""
    spec = config.build_export(cfg)
    torch.set_num_threads(spec["threads"])
    result = export(spec["source"], spec["output"], spec["settings"], overwrite=spec["overwrite"],
                    progress=log.info)
    o, c = result.report["output_parity"], result.report["closed_loop_parity"]
    log.info("wrote %s (opset %d): output parity max |diff| %s (%.2g of the action range, bound %.2g); closed loop "
             "over %d rollouts: cost %.6g vs %.6g (relative %.2g, bound %.2g); record in %s", result.onnx_path,
             result.report["opset"], ", ".join(f"{v:.3g}" for v in o["max_abs_diff"]), o["max_scaled_diff"],
             o["tolerance"], c["rollouts"], c["onnx_mean_cost"], c["torch_mean_cost"], c["rel_cost_diff"],
             c["cost_rtol"], result.report_path)
    return result.report


@hydra.main(version_base="1.3", config_path=CONFIG_DIR, config_name="export")
def main(cfg: DictConfig) -> None:
    try:
        run(cfg)
    except (ValueError, CheckpointError, PolicyFileError, VerificationError, FileExistsError) as e:
        log.error("%s", e)
        sys.exit(2)


if __name__ == "__main__":
    main()
