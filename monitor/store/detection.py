"""Per-series detection facts kept beside the newest estimate (issue 12).

``latest_estimates.delay50_obs`` (migration "change alert columns" in
:mod:`monitor.store.schema`): the expected number of observations the change detector needs to
find a change of 0.5 in b at the series' current price variation and noise and the configured
ARL0 (:meth:`monitor.pipeline.run.Pipeline.delay50_obs`). NULL where b is not identified yet
(no noise estimate or no price variation) or with the previous charts. Written by
:func:`write_delay50` in the same transaction as the batch it follows.
"""

from __future__ import annotations

import math
from typing import Mapping

from monitor.store.core import Store, accepts_path


#: the statement of :func:`write_delay50` (also run by the one-row writer)
DELAY50_SQL = "UPDATE latest_estimates SET delay50_obs = ? WHERE series = ?"


@accepts_path(readonly=False)
def write_delay50(store: Store, values: Mapping[str, float]) -> int:
    """Set ``delay50_obs`` of each series' latest estimate (NaN or infinity -> NULL).

    Runs in its own transaction, or inside the caller's (:meth:`Store.atomic` nests). Series
    without a latest estimate row are left alone. Returns the rows updated.
    """
    params = [(float(v) if v is not None and math.isfinite(float(v)) else None, str(s))
              for s, v in values.items()]
    if not params:
        return 0
    with store.atomic():
        cur = store.conn.executemany(DELAY50_SQL, params)
    return int(cur.rowcount)
