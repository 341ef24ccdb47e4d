"""elmon's core package: online log-log elasticity estimation, change detection and alerting.

>>> from monitor import ElasticityRLS
>>> est = ElasticityRLS(forgetting=0.99)
>>> est.status
'warming_up'
"""

__version__ = "0.1.0"
__all__ = ["ElasticityRLS", "__version__"]


def __getattr__(name: str):
    """``monitor.ElasticityRLS`` imported on first use (PEP 562): the estimators load numba and
    scipy, which every ``elmon`` command would otherwise pay for at start, ``--help`` included."""
    if name == "ElasticityRLS":
        from monitor.estimators import ElasticityRLS

        return ElasticityRLS
    raise AttributeError(f"module 'monitor' has no attribute {name!r}")
