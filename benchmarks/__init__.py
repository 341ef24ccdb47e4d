"""Performance measurements of elmon beside reference libraries (``make bench``).

Not part of ``make test``: these are plain scripts run by :mod:`benchmarks.run`, which prints one
markdown table and writes it, with the machine description and the date, to
``benchmarks/RESULTS.md``.

Every figure is the median over several runs; every reference runs in the same process, in the
same run, on the same data (a stated prefix of it where the reference is too slow for the whole),
so a busy shared machine slows both sides alike. Where elmon and a reference compute the same
quantity, an equivalence check says how closely the numbers agree.

One module per figure group:

- :mod:`benchmarks.estimator`: the compiled RLS kernel against river's BayesianLinearRegression
  and LinearRegression, statsmodels' RecursiveLS and a plain Python RLS loop
  (:mod:`benchmarks.plain_rls`);
- :mod:`benchmarks.detection`: estimator plus detectors plus rules, against river's PageHinkley
  and ADWIN;
- :mod:`benchmarks.replay`: ``run_replay`` of a 10M-row CSV against pyarrow's parse time;
- :mod:`benchmarks.ingest`: batched writes into the SQLite store;
- :mod:`benchmarks.live`: one observation through the in-process live path, and a row landing in
  a tailed CSV until its alert is in the outbox;
- :mod:`benchmarks.memory`: state bytes per series and resident size at 1M series;
- :mod:`benchmarks.dashboard`: the overview page's render time with 10k series (AppTest);
- :mod:`benchmarks.tuning`: threshold tuning, settings x observations per second, local and Dask.
"""
