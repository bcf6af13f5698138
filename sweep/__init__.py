"""sweep: robustness sweeps of feedback loops whose plant parameters carry tolerances.

The public API (see DESIGN section 7)::

    sweep.load_config(path)                 # TOML file -> frozen Config
    sweep.analyze(num, den, ...)            # one loop: boundary gains, intervals, sketch, margins
    sweep.run(config, out=..., jobs=...)    # the whole sweep -> path of the netCDF result
    sweep.certify(config, rtol=...)         # guaranteed bounds on the worst-case critical gain

Heavy modules are imported on first use, so ``import sweep`` stays fast.
"""
from __future__ import annotations

from importlib import import_module
from importlib.metadata import PackageNotFoundError, version as _version
from typing import Any

try:
    __version__ = _version("sweep")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0.0.0"

_LAZY = {
    "load_config": ("sweep.config", "load_config"),
    "analyze": ("sweep.analysis", "analyze"),
    "run": ("sweep.runner", "run"),
    "certify": ("sweep.certify", "certify"),
    "summarize": ("sweep.query", "summarize"),
    "plot": ("sweep.plots", "plot"),
    "open_result": ("sweep.store", "open_result"),
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        module, attr = _LAZY[name]
        return getattr(import_module(module), attr)
    raise AttributeError(f"module 'sweep' has no attribute {name!r}")
