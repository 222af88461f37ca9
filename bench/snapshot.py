"""Time to write and restore the state of many channels, against plain json on the same dicts.

`PYTHONPATH=daemon python bench/snapshot.py [--channels 10000] [--repeats 5]`

In-process, as `zeroline.service.Service.snapshot` / `restore` do it: 10,000 channels at
p = 6 are warmed with a few readings each; a write is `pack_channels` of every channel
(one float64 row each) and `StateStore.save_snapshot` (encode, one file, fsync, rename,
directory fsync); a restore is `StateStore.load_snapshot` (read, CRC, header) and
`unpack_channels` (a new `Channel` per row, with its state). The baseline, in the same run,
is `json.dumps` / `json.loads` of the same channels' `to_state()` dicts as one document,
with no disk and no objects rebuilt: the floor of any JSON snapshot, which is what the
daemon wrote before. Each timing is the median of `repeats`; the restored rows are checked
to equal the saved ones bit for bit.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from collections.abc import Callable

import numpy as np

from common import machine, payload, table, temporary_directory, write_config
from zeroline.channel import Channel, Sample, pack_channels, unpack_channels
from zeroline.config import load_config
from zeroline.replay import resolve_channel
from zeroline.state import SnapshotGroup, StateStore

WARM_READINGS = 5


def timed(action: Callable[[], object], repeats: int) -> tuple[float, object]:
    times, result = [], None
    for _ in range(repeats):
        result = None  # freeing the last result (10,000 channels) is not part of the step
        began = time.perf_counter()
        result = action()
        times.append(time.perf_counter() - began)
    return statistics.median(times), result


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=10000)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    print(machine())
    directory = temporary_directory("zl-bench-snap-")
    config = load_config(write_config(directory, 1883))
    template, _ = resolve_channel(config, "s0-gas")
    names = [f"s{j}-gas" for j in range(args.channels)]
    channels = {name: Channel(template, name) for name in names}
    start = time.time() - 86400.0
    for i in range(WARM_READINGS):
        for j, channel in enumerate(channels.values()):
            data = json.loads(payload(start + 60.0 * i, i + j))
            channel.process(
                Sample(data["time"], data["value"], {"temperature": data["temperature"]})
            )
    store = StateStore(directory / "state")

    wildcards = [(name[:-4],) for name in names]

    def write() -> int:
        packed = pack_channels(list(channels.values()))
        group = SnapshotGroup(template.name, names, wildcards, packed)
        return store.save_snapshot([group], {"journal_seq": 0, "saved_at": time.time()})

    def restore() -> list[Channel]:
        snapshot = store.load_snapshot()
        assert snapshot is not None
        [group] = snapshot.groups
        return unpack_channels(template, group.names, group.packed)

    write_s, written = timed(write, args.repeats)
    size = int(str(written))
    restore_s, restored = timed(restore, args.repeats)
    assert isinstance(restored, list) and len(restored) == args.channels
    again = pack_channels(restored).rows
    assert np.array_equal(again, pack_channels(list(channels.values())).rows, equal_nan=True)
    states = [channel.to_state() for channel in channels.values()]
    dumps_s, text = timed(lambda: json.dumps(states), args.repeats)
    loads_s, _ = timed(lambda: json.loads(str(text)), args.repeats)
    pack_s, packed = timed(lambda: pack_channels(list(channels.values())), args.repeats)
    file_load_s, loaded = timed(store.load_snapshot, args.repeats)
    assert loaded is not None
    group = loaded.groups[0]  # type: ignore[attr-defined]  # timed() returns object
    unpack_s, _ = timed(lambda: unpack_channels(template, names, group.packed), args.repeats)
    new_s, _ = timed(lambda: [Channel(template, n) for n in names], args.repeats)
    rows = [
        [
            "write (pack_channels + save_snapshot)",
            f"{write_s * 1e3:.0f}",
            f"{dumps_s * 1e3:.0f}",
            f"{write_s / dumps_s:.2f}",
            "<= 200 ms",
        ],
        [
            "restore (load_snapshot + unpack_channels)",
            f"{restore_s * 1e3:.0f}",
            f"{loads_s * 1e3:.0f}",
            f"{restore_s / loads_s:.2f}",
            "<= 200 ms",
        ],
    ]
    print(
        f"\n{args.channels} channels at p = 6, snapshot {size:,} bytes "
        f"({size / args.channels:,.0f} per channel, {len(str(text)) / args.channels:,.0f} as "
        f"JSON), median of {args.repeats}"
    )
    print(table(["step", "zeroline ms", "json baseline ms", "ratio", "target"], rows))
    print(
        f"parts: pack_channels {pack_s * 1e3:.0f} ms; save_snapshot (encode + disk) "
        f"{(write_s - pack_s) * 1e3:.0f} ms; load_snapshot (read + CRC + header) "
        f"{file_load_s * 1e3:.0f} ms; unpack_channels {unpack_s * 1e3:.0f} ms; Channel() of "
        f"all {new_s * 1e3:.0f} ms ({new_s / args.channels * 1e6:.1f} µs each)"
    )
    del packed
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
