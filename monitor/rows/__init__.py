"""Rows before the pipeline: validation with rejects (``validate``), the one timestamp reader and
formatter (``isotime``), the row path to design rows (``prepare``) and the result frames
(``frames``)."""
