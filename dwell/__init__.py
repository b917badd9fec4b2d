"""dwell: terminals served by moving satellites.

Handover rate, dwell, outage and switching interruption of ground terminals under a given
constellation, site obstruction and serving policy.  The public surface is small:

- :func:`dwell.io.config.load_scenario` reads and validates a scenario TOML file;
- :class:`dwell.orbits.sky.Sky` propagates the constellation and finds visibility windows;
- :func:`dwell.run.run_scenario` runs every terminal under every policy;
- the ``dwell`` command line (``dwell --help``) wraps all of it.
"""

__version__ = "0.1.0"

from . import _moved  # noqa: E402  (old module names keep working, with a warning)

_moved.install()
