"""The ``[estimator]`` section: its keys (the schema :mod:`monitor.settings` composes) and the
estimator prototype built from it.

Keys (defaults in brackets): model ["loglinear"] or "poisson"; band ["hc"], "hac" or
"classic"; hac_lags [8]; exposure [""]: name of the exposure column (opening hours, customers,
connected meters; Poisson model); forgetting [0.99], controls [[]], log_controls [[]],
level [0.95], prior_mean [0.0], prior_sd [none: no prior], min_n_eff [10.0],
min_price_sd [0.02], excitation_guard [true], guard_forgetting [0.8]; instruments [[]] and
log_instruments [[]]: instrument columns, entered as given / in logs (recursive 2SLS,
:mod:`monitor.estimators.iv`; the prior and excitation-guard keys do not apply to it).
"""

from __future__ import annotations

from monitor.errors import ConfigError, ValidationError
from monitor.estimators.dispatch import make_estimator


ESTIMATOR_KEYS = {"model": (str, "loglinear"), "band": (str, "hc"), "hac_lags": (int, 8),
                  "exposure": (str, ""), "forgetting": ((int, float), 0.99),
                  "controls": (list, []),
                  "log_controls": (list, []), "level": ((int, float), 0.95),
                  "prior_mean": ((int, float), 0.0), "prior_sd": ((int, float), None),
                  "min_n_eff": ((int, float), 10.0), "min_price_sd": ((int, float), 0.02),
                  "excitation_guard": (bool, True), "guard_forgetting": ((int, float), 0.8),
                  "instruments": (list, []), "log_instruments": (list, [])}
#: the sections this module owns, for monitor.settings to compose
SECTIONS = {"estimator": ESTIMATOR_KEYS}


def estimator_from_config(cfg):
    """The estimator prototype of ``[estimator] model`` (ElasticityRLS or ElasticityPoisson)
    from the section of a :class:`monitor.sections.Config` (the class's defaults for keys not
    given), mapping ValueError to ConfigError. ``exposure`` (a column name) is kept on the
    Poisson estimator for the row path."""
    params = dict(cfg.section("estimator"))
    model = params.pop("model", "loglinear")
    instruments = params.pop("instruments", None) or []
    log_instruments = params.pop("log_instruments", None) or []
    if instruments or log_instruments:          # recursive 2SLS (issue 17)
        from monitor.estimators.iv import iv_from_settings

        if model != "loglinear":
            raise ConfigError(f"[estimator] instruments need model = 'loglinear' (2SLS on "
                              f"log q), not {model!r}")
        try:
            return iv_from_settings({**params, "instruments": instruments,
                                     "log_instruments": log_instruments})
        except (ValueError, ValidationError) as exc:
            raise ConfigError(f"[estimator] {exc}") from None
    exposure = params.pop("exposure", "")
    if model == "poisson":
        params["exposure"] = exposure
    elif exposure:
        raise ConfigError(f"[estimator] exposure = {exposure!r}: an exposure column is used by "
                          f"the Poisson model only (set model = \"poisson\")")
    try:
        return make_estimator(model, **params)
    except ValueError as exc:
        raise ConfigError(f"[estimator] {exc}") from None
