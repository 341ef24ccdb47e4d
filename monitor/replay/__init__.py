"""Replay of a whole observation log: the driver (whole file or chunked), one chunk
(``kernel``), the Dask engine (``dask``) and detection metrics against known truth
(``detection``)."""
