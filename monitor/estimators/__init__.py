"""Elasticity estimators: the streaming class and its batch kernel (same compiled step)."""

from monitor.estimators.batch import BatchResult, run_batch
from monitor.estimators.rls import ElasticityRLS

__all__ = ["ElasticityRLS", "BatchResult", "run_batch"]
