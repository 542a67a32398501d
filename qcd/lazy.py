"""Later: a module, or one name of it, imported when first called or looked into.

Measuring alone (``qcd scan`` of one file, the worker processes) never needs the judge,
charts, alerts or the process pool, and a one-file scan's start-up counts (DEVELOPERS.md,
start-up). Imports nothing of qcd.
"""
from __future__ import annotations

import importlib
from typing import Any

__all__ = ["Later"]


class Later:
    """``Later("qcd.alerts")`` stands for the module, ``Later("qcd.judge", "judge")`` for one
    of its names; the import happens on first use and its result is kept."""

    def __init__(self, module: str, name: str | None = None) -> None:
        self._where = (module, name)
        self._got: Any = None

    def _get(self) -> Any:
        if self._got is None:
            module, name = self._where
            m = importlib.import_module(module)
            self._got = m if name is None else getattr(m, name)
        return self._got

    def __getattr__(self, attr: str) -> Any:
        return getattr(self._get(), attr)

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        return self._get()(*args, **kwargs)
