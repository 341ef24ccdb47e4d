"""The t quantile table without scipy.stats, and ``elmon ingest``'s start without it (issue 15).

``t_table`` is computed with ``scipy.special.stdtrit`` / ``ndtri`` (what ``scipy.stats.t.ppf``
and ``scipy.stats.norm.ppf`` call); the reference here is ``scipy.stats`` itself. Not a speed
test: the second check is *which* modules the ingest command loads (importing scipy.stats cost
about 0.3 s of the command's start).
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

from monitor.estimators.tquantile import N_GRID, t_quantile, t_table


@pytest.mark.parametrize("level", [0.5, 0.8, 0.9, 0.95, 0.99, 0.999])
def test_table_equals_scipy_stats_to_the_bit(level):
    u = np.linspace(0.0, 1.0, N_GRID)
    prob = 0.5 + level / 2.0
    want = np.r_[stats.norm.ppf(prob), stats.t.ppf(prob, 1.0 / u[1:])]
    got = t_table(level)
    assert got.shape == want.shape
    assert np.array_equal(got.view(np.int64), want.view(np.int64))
    for df in (1.0, 2.0, 4.0, 40000.0):             # grid points: the lookup is the table's
        assert t_quantile(level, df) == stats.t.ppf(prob, df)


def test_ingest_command_does_not_import_scipy_stats():
    code = ("import sys\n"
            "import monitor.cli, monitor.cli.service_cmd, monitor.live.service, monitor.settings\n"
            "from monitor.live.monitor import Monitor\n"
            "from monitor.estimators.tquantile import t_table\n"
            "t_table(0.95)\n"
            "import monitor.experiments\n"
            "print('scipy.stats' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=300, check=True)          # hang guard only
    assert out.stdout.split() == ["False"]
    # the names monitor.experiments reads from its status module when first used
    from monitor.experiments import VERDICTS, evaluate
    from monitor.experiments.status import VERDICTS as V2, evaluate as e2
    assert VERDICTS is V2 and evaluate is e2
