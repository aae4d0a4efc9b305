"""How an Arrow binary array is handed to the compiled helpers (``setup.py``): the helpers read
its offsets and data buffers directly, so they take only ``binary`` / ``large_binary`` arrays
without nulls; anything else goes to each helper's numpy or Arrow reference."""

from __future__ import annotations

import pyarrow as pa


def plain_binary(arr: pa.Array) -> bool:
    """A ``binary`` or ``large_binary`` array without nulls."""
    return (pa.types.is_binary(arr.type) or pa.types.is_large_binary(arr.type)) and not arr.null_count


def binary_args(arr: pa.Array) -> tuple[pa.Buffer, pa.Buffer | bytes, int, bool]:
    """(offsets buffer, data buffer, slice offset, large) of a :func:`plain_binary` array, as the
    compiled helpers take them (an array of empty elements may have no data buffer)."""
    _, offsets, data = arr.buffers()
    return offsets, data if data is not None else b"", arr.offset, pa.types.is_large_binary(arr.type)
