"""Input and output: scenario files (``config``, ``schema``, ``errors``), atomic writes
(``atomic``), Parquet tables with provenance (``tables``), geometry tables (``outputs``) and
plain-text tables (``text``)."""
