"""Monitors the training loop reports to: TensorBoard event files, and a progress bar in the terminal."""

from __future__ import annotations

import logging
import math
import sys
from typing import Any

from apg.diagnostics import GradientProfile
from apg.reports.figures import profile_figure, trajectory_figure
from apg.rollout import Evaluation
from apg.runs import flatten
from apg.train import Monitor, RunInfo

# TensorBoard tags, in one place so docs and tests name the same strings.
TAGS = {
    "cost": "train/cost",
    "grad_norm": "train/grad_norm",
    "learning_rate": "train/learning_rate",
    "horizon": "train/horizon",  # steps per training rollout (changes under train.horizon_start)
    "continuation": "train/continuation",  # the annealed parameter's value (train.continuation_param)
    "iteration_seconds": "speed/iteration_seconds",
    "sim_steps_per_second": "speed/sim_steps_per_second",
    "eval_cost": "heldout/cost",
    "success_rate": "heldout/success_rate",
    "figure": "heldout/trajectories",
    # Gradient diagnostics every train.diagnose_every iterations: the costate heatmap (an image) and the keys of
    # apg.diagnostics.GradientProfile.summary().
    "gradient_profile": "gradients/profile",
    "costate_growth_log10": "gradients/costate_growth_log10",
    "jacobian_sigma_max_log10": "gradients/jacobian_sigma_max_log10",
    "jacobian_sigma_final_log10": "gradients/jacobian_sigma_final_log10",
    "costate_norm_first": "gradients/costate_norm_first",
    "costate_norm_last": "gradients/costate_norm_last",
    "costate_norm_max": "gradients/costate_norm_max",
    "action_grad_max": "gradients/action_grad_max",
}
# A gradient-profile warning repeats only once the profile's severity has grown this many times past the last one.
REWARN_FACTOR = 10.0

log = logging.getLogger("apg.train")


class TensorBoardMonitor(Monitor):
    """Scalars every iteration, held-out metrics and figures, and hyperparameters with final metrics."""

    def __init__(self) -> None:
        self.writer = None

    def start(self, run: RunInfo) -> None:
        from torch.utils.tensorboard import SummaryWriter

        self.run = run
        # purge_step drops events a crashed run wrote after its last checkpoint, so curves never double back.
        self.writer = SummaryWriter(str(run.run_dir), purge_step=run.start_iteration or None)

    def iteration(self, it: int, stats: dict[str, float]) -> None:
        for key, tag in TAGS.items():
            if key in stats:
                self.writer.add_scalar(tag, stats[key], it)

    def evaluation(self, it: int, result: Evaluation) -> None:
        self.writer.add_scalar(TAGS["eval_cost"], result.mean_cost, it)
        self.writer.add_scalar(TAGS["success_rate"], result.success_rate, it)
        s = self.run.settings
        if s.figure_every and (it % s.figure_every == 0 or it == s.iterations):
            fig = trajectory_figure(self.run.system, result.trajectory, result.success, s.figure_trajectories)
            self.writer.add_figure(TAGS["figure"], fig, it, close=True)

    def diagnostics(self, it: int, profile: GradientProfile) -> None:
        """The costate heatmap as an image and the profile's summary scalars."""
        for key, value in profile.summary().items():
            self.writer.add_scalar(TAGS[key], value, it)
        self.writer.add_figure(TAGS["gradient_profile"], profile_figure(profile), it, close=True)

    def end(self, metrics: dict[str, Any]) -> None:
        hparams = {k: v if isinstance(v, (int, float, str, bool)) else str(v)
                   for k, v in flatten(self.run.record.to_dict()).items()}
        finals = {f"final/{k}": float(metrics[k]) for k in ("eval_cost", "success_rate", "wall_time_s")}
        self.writer.add_hparams(hparams, finals, run_name="hparams")

    def close(self) -> None:
        if self.writer is not None:
            self.writer.close()
            self.writer = None


class ProgressMonitor(Monitor):
    """A tqdm bar with the current training cost and the last held-out result, and exploding-gradient warnings.

    A gradient profile's warning goes to the ``apg.train`` logger (even with the bar disabled): the first time in
    a run, then only when its severity (``GradientProfile.severity``) has grown ``REWARN_FACTOR`` times past the
    last warned value, so the terminal is not flooded.
    """

    def __init__(self, enabled: bool = True) -> None:
        self.enabled = enabled
        self.bar = None
        self.postfix: dict[str, str] = {}
        self.warned_severity: float | None = None

    def start(self, run: RunInfo) -> None:
        self.warned_severity = None
        if not self.enabled:
            return
        from tqdm import tqdm

        self.bar = tqdm(total=run.settings.iterations, initial=run.start_iteration, desc=f"train {run.system.name}",
                        unit="it", file=sys.stderr, dynamic_ncols=True, mininterval=0.5)

    def iteration(self, it: int, stats: dict[str, float]) -> None:
        if self.bar is not None:
            self.postfix["cost"] = f"{stats['cost']:.4g}"
            self.bar.set_postfix(self.postfix, refresh=False)
            self.bar.update(it - self.bar.n)

    def evaluation(self, it: int, result: Evaluation) -> None:
        if self.bar is not None:
            self.postfix["heldout"] = f"{result.mean_cost:.4g}"
            self.postfix["success"] = f"{result.success_rate:.0%}"
            self.bar.set_postfix(self.postfix)

    def diagnostics(self, it: int, profile: GradientProfile) -> None:
        message = profile.warning()
        if message is None:
            return
        severity, last = profile.severity, self.warned_severity
        if last is not None and (math.isinf(last) or severity < REWARN_FACTOR * last):
            return
        self.warned_severity = severity
        log.warning("iteration %d: %s", it, message)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None
