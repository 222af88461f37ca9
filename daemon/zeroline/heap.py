"""Ask glibc's allocator to hand large freed blocks back to the system at once.

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
"""

from __future__ import annotations

import ctypes
import os
import platform

M_MMAP_THRESHOLD = -3  # glibc <malloc.h>
LARGE_BLOCK_BYTES = 128 * 1024  # glibc's own starting value (mallopt(3))


def return_large_blocks() -> bool:
    """Fix glibc's mmap threshold at `LARGE_BLOCK_BYTES`; True if it was set here."""
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or platform.libc_ver()[0] != "glibc":
        return False
    try:
        libc = ctypes.CDLL(None)
        return bool(libc.mallopt(M_MMAP_THRESHOLD, LARGE_BLOCK_BYTES))
    except (OSError, AttributeError):  # no symbol table to look in, or no mallopt
        return False
