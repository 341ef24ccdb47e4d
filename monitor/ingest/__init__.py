"""Reading observations: the source protocol and chunk (``base``), sources from config
(``factory``), file and folder sources (``files``), CSV text (``csv_text``), SQL tables (``sql``),
whole logs (``logio``) and chunked logs (``chunks``)."""
