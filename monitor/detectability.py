"""What a series' expected detection delay tells its user (issue 12).

``delay50_obs`` (:meth:`monitor.pipeline.run.Pipeline.delay50_obs`) is the expected number of
observations to detect a change of 0.5 in b at the series' price variation and the configured
ARL0. :func:`delay_text` turns it into the sentence used in alert texts, ``elmon status`` and
the dashboard. Kept free of numerical imports so that the dashboard can use it without loading
the compiled pipeline.
"""

from __future__ import annotations

import math

#: observations beyond which a series' expected delay to detect a change of 0.5 in b means
#: that its prices do not move enough to watch b (about three years of daily data, six weeks
#: of hourly data); stated in the README's section on alerts
WATCH_HORIZON_OBS = 1000


def delay_text(delay: float) -> str:
    """"at this price variation a change of 0.5 in b takes about N observations to detect",
    with "its prices do not move enough to watch b" where N exceeds :data:`WATCH_HORIZON_OBS`.
    """
    if delay is None or not math.isfinite(delay):
        return ("at this price variation a change of 0.5 in b cannot be detected (no price "
                "variation or no noise estimate yet)")
    n = int(round(delay, -1)) if delay >= 100 else max(int(round(delay)), 1)
    text = (f"at this price variation a change of 0.5 in b takes about {n:,} observations to "
            "detect")
    if delay > WATCH_HORIZON_OBS:
        text += (f", beyond the horizon of {WATCH_HORIZON_OBS:,} observations: its prices do "
                 "not move enough to watch b")
    return text
