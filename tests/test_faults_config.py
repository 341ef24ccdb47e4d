"""Config faults (issue 14, item 7 in part): inf, nan and huge times in [service] are refused
at load with the key named, instead of a traceback or a service that never runs a job."""

from __future__ import annotations

import math

import pytest

from monitor.errors import ConfigError
from monitor.live.settings import MAX_SECONDS, service_settings
from monitor.sections import Config


@pytest.mark.parametrize("key", ["poll_interval_s", "misfire_grace_s", "delivery_interval_s",
                                 "stale_check_s", "delivery_backoff_s", "series_stale_after_s",
                                 "reminder_every_s", "delivery_max_backoff_s"])
@pytest.mark.parametrize("value", [math.inf, math.nan, 1e300, MAX_SECONDS + 1.0])
def test_a_time_that_is_not_finite_or_is_huge_is_refused_naming_the_key(key, value):
    with pytest.raises(ConfigError, match=rf"\[service\] {key} = "):
        service_settings(Config({"service": {key: value}}))


def test_the_longest_accepted_time_still_loads():
    sec = service_settings(Config({"service": {"misfire_grace_s": float(MAX_SECONDS),
                                               "reminder_every_s": 0.0}}))
    assert sec["misfire_grace_s"] == MAX_SECONDS
