"""Watching a live price experiment: pooled b with fixed band and confidence sequence, per-series
estimates and their spread, time to precision, health checks and a verdict.

- :mod:`~monitor.experiments.plan`: the ``[experiments.NAME]`` definition and its checks;
- :mod:`~monitor.experiments.pooled`: the pooled within-series fit after every observation;
- :mod:`~monitor.experiments.sequence`: anytime-valid confidence sequences;
- :mod:`~monitor.experiments.heterogeneity`: spread of the series' elasticities;
- :mod:`~monitor.experiments.precision`: time to precision;
- :mod:`~monitor.experiments.health`: ladder, balance and stall checks;
- :mod:`~monitor.experiments.status`: all of it for one experiment, and the verdict;
- :mod:`~monitor.experiments.report`: the self-contained HTML report.
"""

from monitor.experiments.plan import (EXPERIMENTS_SECTION, ExperimentPlan, check_experiments,
                                      plan_from_config, plans_from_section)

#: names read from :mod:`~monitor.experiments.status` when first used: importing it imports
#: scipy.stats (health checks, confidence sequences), about 0.3 s that every command paid at
#: its start through :mod:`monitor.settings`, which needs only the ``[experiments]`` schema
_FROM_STATUS = ("SUMMARY_FIELDS", "VERDICTS", "ExperimentStatus", "evaluate")


def __getattr__(name: str):
    if name in _FROM_STATUS:
        from monitor.experiments import status
        return getattr(status, name)
    raise AttributeError(f"module 'monitor.experiments' has no attribute {name!r}")


__all__ = ["EXPERIMENTS_SECTION", "ExperimentPlan", "ExperimentStatus", "SUMMARY_FIELDS",
           "VERDICTS", "check_experiments", "evaluate", "plan_from_config", "plans_from_section"]
