"""Elasticity estimators: the streaming classes (log-log least squares, Poisson
pseudo-maximum likelihood) and their batch path (same compiled step)."""

from monitor.estimators.batch import BatchResult, run_batch
from monitor.estimators.dispatch import make_estimator
from monitor.estimators.poisson import ElasticityPoisson, poisson_fit
from monitor.estimators.rls import ElasticityRLS

__all__ = ["ElasticityRLS", "ElasticityPoisson", "BatchResult", "run_batch", "make_estimator",
           "poisson_fit"]
