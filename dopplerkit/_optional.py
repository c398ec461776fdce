"""Optional dependencies: a clear error naming the extra that installs a missing package."""

from __future__ import annotations

import importlib

#: package -> the dopplerkit extra that installs it
EXTRAS = {"emcee": "posterior", "pandas": "posterior", "ipywidgets": "notebook", "dask": "cluster", "distributed": "cluster"}


def require(module: str, what: str):
    """Import ``module`` or raise ImportError saying which extra installs it and what needs it.

    >>> require("numpy", "arrays").__name__
    'numpy'
    """
    try:
        return importlib.import_module(module)
    except ImportError:
        top = module.split(".")[0]
        extra = EXTRAS.get(top)
        hint = f"pip install 'dopplerkit[{extra}]'" if extra else f"pip install {top}"
        raise ImportError(f"{what} needs the optional package {top!r}, which is not installed: {hint}") from None
