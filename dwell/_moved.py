"""Old flat module names (``dwell.schema``, ``dwell.link``, ...) kept importable after the
modules moved into layers (``dwell.io``, ``dwell.radio``, ``dwell.orbits``, ``dwell.analysis``).

Importing an old name returns the moved module itself (the same object, so ``isinstance`` and
module state agree) and warns once with the new name.  Plug-in rules written against the old
names keep working.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.util
import sys
import warnings

MOVED = {
    **{f"dwell.{m}": f"dwell.orbits.{m}"
       for m in ("timebase", "frames", "sky", "look", "passes", "geometry")},
    **{f"dwell.{m}": f"dwell.radio.{m}" for m in ("link", "measure", "noise", "hardware")},
    **{f"dwell.{m}": f"dwell.io.{m}"
       for m in ("config", "schema", "errors", "atomic", "tables", "outputs")},
    **{f"dwell.{m}": f"dwell.analysis.{m}" for m in ("analytic", "compare", "plots", "report")},
}


class _Alias(importlib.abc.Loader):
    def __init__(self, target: str):
        self.target = target

    def create_module(self, spec):
        warnings.warn(f"{spec.name} moved to {self.target}; import it from there",
                      DeprecationWarning, stacklevel=4)
        return importlib.import_module(self.target)

    def exec_module(self, module) -> None:
        """The target module is already executed."""


class _Finder(importlib.abc.MetaPathFinder):
    def find_spec(self, fullname, path=None, target=None):
        new = MOVED.get(fullname)
        if new is None:
            return None
        return importlib.util.spec_from_loader(fullname, _Alias(new))


def install() -> None:
    if not any(isinstance(f, _Finder) for f in sys.meta_path):
        sys.meta_path.insert(0, _Finder())
