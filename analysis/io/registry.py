"""The registry of fix readers: which :class:`~.backend.FixBackend` reads a source.

:data:`BACKENDS` maps engine names to reader instances, in the order they were registered. Given
``engine=``, :func:`find_backend` takes that reader; otherwise it asks each reader's ``guess_can_open``,
the most recently registered first (so a reader registered by a project can take over an ending that a
built-in reader also claims), and takes the first that says yes.
"""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError
from .backend import FixBackend
from .columns import source_label
from .frames import DataFrameBackend
from .netcdf import DatasetBackend, NetcdfBackend
from .tabular import CsvBackend, ParquetBackend

__all__ = ["BACKENDS", "register_backend", "find_backend", "known_formats"]

#: engine name -> reader, in registration order
BACKENDS: dict[str, FixBackend] = {}


def register_backend(backend: FixBackend) -> FixBackend:
    """Add a reader to the registry (replacing any reader of the same name) and return it.

    Parameters
    ----------
    backend : FixBackend
        An instance; its ``name`` is what ``engine=`` selects it by.

    Raises
    ------
    TypeError
        If ``backend`` is not a :class:`FixBackend` instance.
    ValueError
        If its name is empty.
    """
    if not isinstance(backend, FixBackend):
        raise TypeError(f"register_backend takes a FixBackend instance, not {type(backend).__name__}")
    name = str(backend.name).strip().lower()
    if not name:
        raise ValueError(f"{type(backend).__name__} has no name")
    BACKENDS.pop(name, None)  # a replacement is tried first, like any new registration
    BACKENDS[name] = backend
    return backend


def known_formats() -> str:
    """The registered readers and what each claims, on one line."""
    return "; ".join(f"{name} ({b.claims()})" for name, b in BACKENDS.items())


def find_backend(source, engine: str | None = None) -> FixBackend:
    """The reader for ``source``: the one named ``engine``, or the one whose ``guess_can_open`` accepts it.

    Parameters
    ----------
    source : str, os.PathLike or object in memory
        A file name (which must exist), a :class:`pandas.DataFrame`, an :class:`xarray.Dataset`, or
        anything a registered reader claims.
    engine : str, optional
        A registered reader's name (case-insensitive); overrides guessing, e.g. for a file whose ending
        misleads.

    Raises
    ------
    InputError
        One line naming the source and listing the known formats, if ``engine`` is not registered or no
        reader claims ``source``; or ``<path>: no such file``.
    """
    where = source_label(source)
    if engine is not None:
        backend = BACKENDS.get(str(engine).strip().lower())
        if backend is None:
            raise InputError(f"{where}: unknown engine {engine!r}; known formats: {known_formats()}")
    if isinstance(source, (str, os.PathLike)) and not Path(os.fspath(source)).exists():
        raise InputError(f"{where}: no such file")
    if engine is not None:
        return backend
    for backend in reversed(BACKENDS.values()):
        if backend.guess_can_open(source):
            return backend
    what = "file" if isinstance(source, (str, os.PathLike)) else "object"
    raise InputError(f"{where}: no reader claims this {what}; known formats: {known_formats()}; "
                     f"choose one with engine=")


for _backend in (CsvBackend(), ParquetBackend(), NetcdfBackend(), DataFrameBackend(), DatasetBackend()):
    register_backend(_backend)
del _backend
