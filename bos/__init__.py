"""Quantitative background-oriented schlieren (BOS).

The library works on arrays and small dataclasses; file and terminal I/O
lives at the edges (:mod:`bos.store`, :mod:`bos.images`, the ``cli`` package).

Data flow (no module imports one further up the chain)::

    images -> displacement -> deflection -> gradient -> index -> density
           -> temperature / acoustic pressure -> store / plots
"""

from importlib.metadata import PackageNotFoundError as _PackageNotFoundError
from importlib.metadata import version as _version

try:  # one place for the version: pyproject.toml, read back from the installed metadata
    __version__ = _version("bos-toolkit")
except _PackageNotFoundError:  # pragma: no cover - a source tree that was never installed
    __version__ = "0+unknown"
from ._memory import retain_freed_memory as _retain_freed_memory  # noqa: E402

_retain_freed_memory()  # fewer page faults per frame (bos/_memory.py; BOS_RETAIN_FREED_MEMORY=0 turns it off)
from .store import open_result  # noqa: E402,F401 - bos.open_result(path) -> xarray.Dataset
