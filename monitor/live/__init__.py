"""The live service: the engine (``monitor``: :class:`~monitor.live.monitor.Monitor`), batch and
one-row paths (``batch``, ``one_row``), checkpoints, the scheduler (``service``), its settings
schema (``settings``) and alert delivery (``sinks``)."""
