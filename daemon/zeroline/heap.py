"""Ask glibc's allocator to hand freed memory back to the system.

Two measures. First, large freed blocks go back at once:

glibc serves a request of at least `M_MMAP_THRESHOLD` bytes (128 KiB at start) with its own
mapping, which `free` unmaps. But it raises that threshold each time such a block is freed
(up to 32 MiB on 64-bit), so a daemon that now and then builds large short-lived arrays
(a snapshot packs every channel into a few MB of rows, the parked blocks are repacked, a
10,000-entry dict doubles its table) soon gets them from the ordinary heap, where a block
freed below a live one stays part of the process. Measured with bench/memory.py's workload
(10,000 channels): 8.3 MiB free but held inside the heap after the warm-up; with the
threshold fixed at 128 KiB, 2.2 MiB, and 5.8 MiB less resident memory in all.

Fixing the threshold (`mallopt(M_MMAP_THRESHOLD, ...)`) also turns off that adjustment
(glibc mallopt(3)). The cost is a map and an unmap per large block, which the per-reading
path does not make (the MQTT reader receives into one reused buffer for that reason,
`zeroline.mqtt`). A `MALLOC_MMAP_THRESHOLD_` in the environment is the operator's choice
and is left alone; on other C libraries (musl) this does nothing.

Second, the free pages inside the heap go back when the daemon is idle after much change
(`give_back_free_pages`, glibc's malloc_trim(3), which since glibc 2.8 also releases whole
free pages in the middle of the heap, not only at its top). Channels moved in and out of
the resident set free many small blocks between live ones, so the heap keeps pages with no
live byte in them. Measured with bench/memory.py's workload in one process (10,000
channels, default resident bound): 2.1 MiB less resident memory, for 0.6 ms of CPU.
"""

from __future__ import annotations

import ctypes
import os
import platform

M_MMAP_THRESHOLD = -3  # glibc <malloc.h>
_GLIBC = platform.libc_ver()[0] == "glibc"
LARGE_BLOCK_BYTES = 128 * 1024  # glibc's own starting value (mallopt(3))


def return_large_blocks() -> bool:
    """Fix glibc's mmap threshold at `LARGE_BLOCK_BYTES`; True if it was set here."""
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or not _GLIBC:
        return False
    try:
        libc = ctypes.CDLL(None)
        return bool(libc.mallopt(M_MMAP_THRESHOLD, LARGE_BLOCK_BYTES))
    except (OSError, AttributeError):  # no symbol table to look in, or no mallopt
        return False


def give_back_free_pages() -> bool:
    """Release the heap's wholly free pages to the system (malloc_trim(0)); True if some
    were. A call costs about a millisecond on a 20 MiB heap: for idle moments only."""
    if not _GLIBC:
        return False
    try:
        return bool(ctypes.CDLL(None).malloc_trim(0))
    except (OSError, AttributeError):
        return False
