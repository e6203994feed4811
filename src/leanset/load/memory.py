"""Hand memory back to the system after a whole-table pass."""

import ctypes

import pyarrow as pa


def release_memory() -> None:
    """Hand memory freed by a whole-table pass back to the system: Arrow's pool keeps decoded row
    groups, and glibc's heap keeps freed batch-sized blocks unless trimmed (no-op elsewhere)."""
    pa.default_memory_pool().release_unused()
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass
