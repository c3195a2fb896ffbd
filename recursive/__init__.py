"""recursive: the numerical core of posteriord.

Bayesian linear regression on basis functions, updated one observation at a time in
square-root information form, with forgetting policies and a robust gate. Pure
computation: imports only numpy and scipy; time is always passed in as an argument.
"""

from recursive.forgetting import Exponential, Forgetting, RandomWalk, Stabilized, TermDrift
from recursive.posterior import Gate, OutOfOrderError, Posterior, Prediction, Step

__all__ = [
    "Exponential",
    "Forgetting",
    "Gate",
    "OutOfOrderError",
    "Posterior",
    "Prediction",
    "RandomWalk",
    "Stabilized",
    "Step",
    "TermDrift",
]
