"""Threshold tuning: the search space and recommended config (``space``), the rows a grid shares
(``rows``), running a grid (``grid``), the no-truth bootstrap check (``calibrate``) and the
``elmon tune`` work (``tune``)."""
