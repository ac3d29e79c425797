"""apg: train feedback controllers for planar machines by analytic policy gradients.

Public API (everything else is internal):

* policies: :class:`PolicySettings`, :class:`Policy`, :func:`make_policy`
* the closed loop: :func:`rollout` (truncation, recomputation, departures of the plant), :func:`evaluate`,
  :class:`Trajectory`
* gradients: :class:`GradientEstimator`, :class:`Analytic` (BPTT, optionally truncated), :class:`TerminalValue`
  (short-horizon actor-critic), :class:`EvolutionStrategies`, :class:`LikelihoodRatio`, :class:`AlphaOrder`,
  :func:`make_estimator`; PPO through :class:`PPOSettings`
* diagnostics: :func:`gradient_profile` (per-time-step gradient norms, state-Jacobian growth), :class:`GradientProfile`
* training: :class:`TrainSettings`, :class:`OptimSettings`, :func:`train`, :func:`train_record`
* runs: :class:`RunRecord` (every setting of a run), :func:`load_run` (a run rebuilt from its record alone)
"""

from apg.diagnostics import GradientProfile, gradient_profile
from apg.estimators import (AlphaOrder, Analytic, Estimate, EstimatorSettings, EvolutionStrategies, GradientEstimator,
                            LikelihoodRatio, TerminalValue, make_estimator)
from apg.optim import OptimSettings
from apg.policies import Policy, PolicySettings, make_policy
from apg.rollout import Evaluation, Trajectory, evaluate, rollout
from apg.runs import LoadedRun, RunExistsError, RunRecord, TrainSettings, load_run
from apg.train import Monitor, TrainResult, train, train_record
from apg.updates import NonFiniteError, PPOSettings

__all__ = ["AlphaOrder", "EvolutionStrategies", "LikelihoodRatio", "Analytic", "TerminalValue", "GradientProfile",
           "gradient_profile", "Estimate", "EstimatorSettings", "GradientEstimator", "make_estimator", "OptimSettings",
           "Policy", "PolicySettings", "make_policy", "Evaluation", "Trajectory", "evaluate", "rollout", "Monitor",
           "NonFiniteError", "RunExistsError", "TrainSettings", "TrainResult", "train", "train_record", "RunRecord",
           "LoadedRun", "load_run", "PPOSettings"]
