"""Where satellites are and when each terminal sees them: scenario time and frames
(``timebase``, ``frames``), chunked SGP4 (``sky``), look angles (``look``), pass finding
(``passes``) and the per-terminal visibility windows of a whole run (``geometry``)."""
