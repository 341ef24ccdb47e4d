"""elmon's core package: online log-log elasticity estimation, change detection and alerting.

>>> from monitor import ElasticityRLS
>>> est = ElasticityRLS(forgetting=0.99)
>>> est.status
'warming_up'
"""

from monitor.estimators import ElasticityRLS

__version__ = "0.1.0"
__all__ = ["ElasticityRLS", "__version__"]
