"""Pandas frames for an Export, built over the Arrow and numpy arrays in hand without copying them."""

from __future__ import annotations

import functools

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from monitor.ingest.table import FRAME_TEXT

STR = pd.Series([], dtype="str").dtype  # pandas' default string dtype (pyarrow storage, NaN as missing)
SMALL_FRAME_ROWS = 10_000  # frames up to this many rows are built by pandas' array constructor (see frame_of)
_KINDS = {"source_line": "int64", "value": "float64", "mean": "float64", "sd": "float64", "n": "int64"}
_COLUMN_INDEX: dict[tuple[str, ...], pd.Index] = {}  # one per column set; each frame gets a cheap copy
_EMPTY: dict[tuple[str, ...], pd.DataFrame] = {}


def frame_of(arrays: list[object], columns: tuple[str, ...], n: int) -> pd.DataFrame:
    """A frame over ``arrays`` (already of the documented dtypes and length ``n``), index 0..n-1.

    For a small frame, pandas' ``DataFrame._from_arrays`` (when this pandas has it) skips the dict and
    column-name handling that costs most of a small file's frame; it copies numeric arrays into 2-D
    blocks, so a large frame takes the dict constructor, which keeps them without a copy.
    """
    index = pd.RangeIndex(n)
    from_arrays = getattr(pd.DataFrame, "_from_arrays", None)
    if from_arrays is not None and n <= SMALL_FRAME_ROWS:
        if columns not in _COLUMN_INDEX:
            _COLUMN_INDEX[columns] = pd.Index(columns)
        try:
            # a copy: a consumer setting ``frame.columns.name`` must not rename every other frame's columns
            return from_arrays(arrays, columns=_COLUMN_INDEX[columns].copy(), index=index,
                               verify_integrity=False)
        except TypeError:  # another signature in another pandas version
            pass
    return pd.DataFrame(dict(zip(columns, arrays, strict=False)), index=index, copy=False)


def str_array(arr: pa.Array | pa.ChunkedArray) -> pd.api.extensions.ExtensionArray:
    """A pandas "str" array over ``arr`` (cast to large_string if needed: new offsets, the same characters).

    The new offsets come from the system allocator: measured on a million-row file, Arrow's default pool
    kept ~2 MB more resident per cast column than it handed out.
    """
    if arr.type != FRAME_TEXT:
        arr = pc.cast(arr, FRAME_TEXT, memory_pool=pa.system_memory_pool())
    return pd.arrays.ArrowStringArray(arr, dtype=STR)


def repeat_text(text: str, n: int) -> pa.Array:
    """``text`` ``n`` times, in the frames' string type (built from two numpy buffers: no per-row work).

    Arrow arrays are immutable, so the small ones are kept and handed out again (a file's "" and unit columns).
    """
    if n <= SMALL_FRAME_ROWS:
        return _repeat_small(text, n)
    return _repeat(text, n)


@functools.lru_cache(maxsize=64)
def _repeat_small(text: str, n: int) -> pa.Array:
    return _repeat(text, n)


def _repeat(text: str, n: int) -> pa.Array:
    raw = text.encode("utf-8")
    offsets = np.arange(0, (n + 1) * len(raw), max(len(raw), 1), dtype=np.int64) if raw else np.zeros(n + 1, np.int64)
    return pa.Array.from_buffers(FRAME_TEXT, n, [None, pa.py_buffer(offsets), pa.py_buffer(raw * n)])


def empty_frame(columns: tuple[str, ...]) -> pd.DataFrame:
    """An empty frame with the documented dtypes: a copy of one built once (callers may change theirs)."""
    if columns not in _EMPTY:
        _EMPTY[columns] = pd.DataFrame({c: pd.Series([], dtype=_KINDS.get(c, "str")) for c in columns})
    return _EMPTY[columns].copy(deep=False)  # copy-on-write: a change to one copy never reaches another
