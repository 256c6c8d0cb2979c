"""tallfit: exact multiple linear regression, with honest inference, on tables far larger than memory.

Public names: :func:`fit`, :func:`predict`, :func:`load`, :func:`save`, :class:`FitResult`,
and the errors in :mod:`tallfit.errors`. They are imported on first use, so that the command
line starts quickly.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["fit", "predict", "load", "save", "FitResult", "TallfitError", "__version__"]

_LAZY = {
    "fit": ("tallfit.api", "fit"),
    "predict": ("tallfit.api", "predict"),
    "load": ("tallfit.api", "load"),
    "save": ("tallfit.api", "save"),
    "FitResult": ("tallfit.results", "FitResult"),
    "TallfitError": ("tallfit.errors", "TallfitError"),
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        value = getattr(importlib.import_module(module), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'tallfit' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(list(globals()) + list(_LAZY))
