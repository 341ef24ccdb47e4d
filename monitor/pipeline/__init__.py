"""The compiled per-observation loop: estimator step, detectors and alert rules together.

``run`` (:class:`~monitor.pipeline.run.Pipeline`), ``kernel`` (the compiled loop), ``settings``
(the ``[detectors]``, ``[bounds]`` and ``[rules]`` schema and settings objects), ``rules``
(alert policy) and ``messages`` (alert text and event frames).
"""
