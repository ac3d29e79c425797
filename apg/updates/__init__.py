"""What one training iteration does to the policy: a gradient method or PPO, behind one interface.

* :class:`Update` (:mod:`apg.updates.base`): the contract the training loop calls.
* :class:`GradientUpdate`: any :class:`~apg.estimators.GradientEstimator` driving an optimiser.
* :class:`PPOUpdate`: the model-free baseline.

:func:`make_update` turns a run's update settings into an update; adding a method is one file here.
"""

from __future__ import annotations

from apg.estimators import EstimatorSettings, GradientEstimator, make_estimator
from apg.updates.base import NonFiniteError, StepResult, Update
from apg.updates.gradient import GradientUpdate
from apg.updates.ppo import PPOSettings, PPOUpdate, advantages


def make_update(method: Update | GradientEstimator | EstimatorSettings | PPOSettings) -> Update:
    """The update for ``method``: an update as it is, an estimator (or its settings) as a gradient update, PPO
    settings as a PPO update.

    Raises:
        TypeError: ``method`` is none of these.
    """
    if isinstance(method, Update):
        return method
    if isinstance(method, GradientEstimator):
        return GradientUpdate(method)
    if isinstance(method, EstimatorSettings):
        return GradientUpdate(make_estimator(method))
    if isinstance(method, PPOSettings):
        return PPOUpdate(method)
    raise TypeError(f"method must be an Update, a GradientEstimator, EstimatorSettings or PPOSettings; got "
                    f"{type(method).__name__}")


__all__ = ["Update", "StepResult", "NonFiniteError", "GradientUpdate", "PPOUpdate", "PPOSettings", "advantages",
           "make_update"]
