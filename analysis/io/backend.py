"""What a reader of position fixes provides: the :class:`FixBackend` base class.

One subclass per input format; the registry (:mod:`driftspec.analysis.io.registry`) asks each whether it
can open a source and hands the source to the one that can, or to the one named by ``engine=``. The design
follows the backend entry points of xarray (``xarray.backends.BackendEntrypoint``: a description, a
``guess_can_open`` test and an ``open_dataset`` method), reduced to what fixes need.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .columns import source_label, standard_fixes

__all__ = ["FixBackend", "FixChunks"]


@dataclass(frozen=True)
class FixChunks:
    """A source read a part at a time: each part holds whole tracks, in the standard form.

    Attributes
    ----------
    spans : pandas.DataFrame
        First and last fix time of each track (``id``, ``first``, ``last``), known before any chunk is read.
    chunks : callable
        Called with no arguments, returns an iterator over the chunks; every call starts again at the
        first row, so a :class:`FixChunks` can be iterated more than once.
    """

    spans: pd.DataFrame
    chunks: Callable[[], Iterator[pd.DataFrame]]

    def __iter__(self) -> Iterator[pd.DataFrame]:
        return self.chunks()


class FixBackend:
    """Base class of the readers of position fixes, one subclass per format.

    A subclass sets :attr:`name` (what ``engine=`` selects it by), :attr:`description` and :attr:`suffixes`,
    and implements :meth:`read_table`; it may also override :meth:`guess_can_open` (to recognise sources by
    content or type), :meth:`read` (if the column handling of :func:`~.columns.standard_fixes` does not
    fit) and :meth:`open_chunks` (to stream large sources).
    """

    #: the engine name, lower case, unique in the registry
    name: str = ""
    #: one line for error messages and listings
    description: str = ""
    #: file name endings (lower case, with the dot) that this reader claims
    suffixes: tuple[str, ...] = ()

    def claims(self) -> str:
        """What this reader claims, for the list of known formats in error messages."""
        return ", ".join(self.suffixes) or self.description

    def guess_can_open(self, source) -> bool:
        """Whether ``source`` looks like this format; by default, whether it is a file name ending in one of
        :attr:`suffixes`. Must not raise and should not read more than a few bytes."""
        if not isinstance(source, (str, os.PathLike)):
            return False
        name = Path(os.fspath(source)).name.lower()
        return any(name.endswith(s) for s in self.suffixes)

    def read_table(self, source) -> pd.DataFrame:
        """The rows of ``source`` as a table with the source's column names (any of
        :data:`~.columns.COLUMN_ALIASES`, case-insensitive); values may be typed or text.

        Raises
        ------
        InputError
            One line naming the source, if it cannot be read.
        """
        raise NotImplementedError(f"{type(self).__name__} does not implement read_table")

    def read(self, source) -> pd.DataFrame:
        """The fixes of ``source`` in the standard form (see :mod:`~driftspec.analysis.io.columns`), every
        row kept."""
        return standard_fixes(self.read_table(source), source_label(source))

    def open_chunks(self, source, rows_per_chunk: int) -> FixChunks | None:
        """``source`` as chunks of about ``rows_per_chunk`` rows holding whole tracks, or None if this
        reader cannot stream this source (then it is read whole by :meth:`read`). By default, None."""
        return None

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}: {self.claims()}>"
