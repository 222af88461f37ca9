"""`zeroline.heap`: large freed blocks go back to the system instead of staying in the heap,
and an idle daemon can hand back the heap's wholly free pages.

Checked against glibc's own accounting (`mallinfo2`, glibc ≥ 2.33; mallopt(3) and
mallinfo2(3) manual pages): in a fresh interpreter, large arrays are built and freed
between small long-lived objects (which pin the heap around them), as a snapshot does
between the channels' objects; the free bytes left inside the heap are compared with and
without the fixed threshold. Each case runs in its own process, since the setting is
per process and cannot be undone.
"""

from __future__ import annotations

import platform
import subprocess
import sys

import pytest

PROBE = """
import ctypes, sys
import numpy as np
from zeroline import heap
if sys.argv[1] == "fixed":
    assert heap.return_large_blocks()
class Info(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in (
        "arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks", "fsmblks",
        "uordblks", "fordblks", "keepcost")]
libc = ctypes.CDLL(None)
libc.mallinfo2.restype = Info
kept = []
for round_ in range(3):
    big = [np.ones(40_000) for _ in range(20)]  # 320 KB each: above the threshold
    kept.append(np.ones(20_000))  # long-lived, allocated after them
    del big
print(libc.mallinfo2().fordblks)
"""


def free_in_heap(mode: str) -> int:
    result = subprocess.run(
        [sys.executable, "-c", PROBE, mode], capture_output=True, text=True, check=True
    )
    return int(result.stdout)


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc's allocator only")
def test_freed_large_arrays_do_not_stay_in_the_heap() -> None:
    adaptive, fixed = free_in_heap("adaptive"), free_in_heap("fixed")
    assert adaptive > 4_000_000  # the freed arrays stayed in the heap (~6 MB of them)
    assert fixed < 1_000_000, (adaptive, fixed)


def test_an_operator_setting_is_left_alone(monkeypatch: pytest.MonkeyPatch) -> None:
    from zeroline import heap

    monkeypatch.setenv("MALLOC_MMAP_THRESHOLD_", "65536")
    assert heap.return_large_blocks() is False


TRIM_PROBE = """
import sys
from zeroline import heap
def rss_kib():
    for line in open("/proc/self/status"):
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
blocks = [bytes(2000) for _ in range(20_000)]  # 40 MB of heap blocks, below the threshold
kept = blocks[::32]  # one live block per 64 KB pins the heap around the freed ones
del blocks
before = rss_kib()
trimmed = heap.give_back_free_pages()
print(trimmed, before, rss_kib())
"""


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc's allocator only")
def test_free_pages_between_live_blocks_go_back() -> None:
    """Freed blocks between live ones stay resident until malloc_trim(3) releases their
    pages (glibc >= 2.8 releases whole free pages anywhere in the heap, not just its top):
    of ~38 MB freed, most must leave the resident set."""
    result = subprocess.run(
        [sys.executable, "-c", TRIM_PROBE], capture_output=True, text=True, check=True
    )
    trimmed, before, after = result.stdout.split()
    assert trimmed == "True"
    assert int(before) - int(after) > 25_000, (before, after)  # KiB
