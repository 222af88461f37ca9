"""Time to write and restore the state of many channels, against plain json on the same dicts.

`PYTHONPATH=daemon python bench/snapshot.py [--channels 10000] [--repeats 5]`

In-process, with the daemon's own `zeroline.service.Service` (no broker connection: its
`snapshot` and `restore` are called directly): 10,000 channels at p = 6 are warmed with a
few readings each. A write is `Service.snapshot`: `pack_channels` of every channel (one
float64 row each) and `StateStore.save_snapshot` (encode, one file, fsync, rename,
directory fsync). A restore is `Service.restore` into a new service: `load_snapshot`
(read, CRC, header), each block checked against the configured model (`conformed`) and
its channels *parked* as their rows, then the (empty) journal. A parked channel is
unpacked into a `Channel` when it is first asked for; that cost is printed on its own
line ("unpark"), per channel, with every channel asked for once, and the unpacked
channels are checked to pack back to the saved rows bit for bit. The baseline, in the same
run, is `json.dumps` / `json.loads` of the same channels' `to_state()` dicts as one
document, with no disk and no objects rebuilt: the floor of any JSON snapshot, which is what
the daemon wrote before. Each timing is the median of `repeats`. The services keep every
channel resident (`limits.resident_channels` = the channel count), so a write packs all
of them: the slowest case.
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
from zeroline.channel import Channel, Sample, pack_channels
from zeroline.config import Config, load_config
from zeroline.service import Service
from zeroline.state import StateStore

WARM_READINGS = 5


def timed(action: Callable[[], object], repeats: int) -> tuple[float, object]:
    times, result = [], None
    for _ in range(repeats):
        result = None  # freeing the last result (10,000 channels) is not part of the step
        began = time.perf_counter()
        result = action()
        times.append(time.perf_counter() - began)
    return statistics.median(times), result


class NoBroker:
    """The service is never started here: nothing may be sent."""

    def __getattr__(self, name: str) -> object:
        raise AssertionError(f"the snapshot benchmark does not use the broker ({name})")


def service(config: Config, directory: object) -> Service:
    return Service(config, NoBroker(), StateStore(str(directory)))  # type: ignore[arg-type]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=10000)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    print(machine())
    directory = temporary_directory("zl-bench-snap-")
    # Every channel resident (limits.resident_channels = the channel count): the write then
    # packs all of them, the slowest case (beyond the bound a snapshot copies parked rows),
    # and the checks below see every channel as a `Channel`.
    config = load_config(write_config(directory, 1883, resident=args.channels))
    template = config.channels[0]
    state_dir = directory / "state"
    live = service(config, state_dir)
    names = [f"s{j}-gas" for j in range(args.channels)]
    for name in names:
        live.table.create(template.name, (name[:-4],), name)
    channels = live.table.channels
    start = time.time() - 86400.0
    for i in range(WARM_READINGS):
        for j, channel in enumerate(channels.values()):
            data = json.loads(payload(start + 60.0 * i, i + j))
            channel.process(
                Sample(data["time"], data["value"], {"temperature": data["temperature"]})
            )
    store = live.store

    def write() -> int:
        live.snapshot()
        return (state_dir / "snapshot.bin").stat().st_size

    def restore() -> Service:
        restored = service(config, state_dir)
        restored.restore()
        return restored

    def unpark_all() -> list[Channel]:
        table = restore().table  # not timed below: restore_s is subtracted
        return [table.get(name) for name in names]  # type: ignore[misc]

    write_s, written = timed(write, args.repeats)
    size = int(str(written))
    restore_s, restored = timed(restore, args.repeats)
    assert isinstance(restored, Service) and len(restored.table.parked) == args.channels
    both_s, unparked = timed(unpark_all, args.repeats)
    assert isinstance(unparked, list) and len(unparked) == args.channels
    again = pack_channels(unparked).rows
    assert np.array_equal(again, pack_channels(list(channels.values())).rows, equal_nan=True)
    unpark_s = both_s - restore_s
    states = [channel.to_state() for channel in channels.values()]
    dumps_s, text = timed(lambda: json.dumps(states), args.repeats)
    loads_s, _ = timed(lambda: json.loads(str(text)), args.repeats)
    pack_s, packed = timed(lambda: pack_channels(list(channels.values())), args.repeats)
    groups = live._snapshot_groups()  # packed once, then only the file is timed
    meta = {"journal_seq": 0, "saved_at": time.time(), "latest_inputs": {}}
    save_s, _ = timed(lambda: store.save_snapshot(groups, meta), args.repeats)
    file_load_s, loaded = timed(store.load_snapshot, args.repeats)
    assert loaded is not None
    new_s, _ = timed(lambda: [Channel(template, n) for n in names], args.repeats)
    rows = [
        [
            "write (Service.snapshot: pack + save)",
            f"{write_s * 1e3:.0f}",
            f"{dumps_s * 1e3:.0f}",
            f"{write_s / dumps_s:.2f}",
            "<= 200 ms",
        ],
        [
            "restore (Service.restore: load + park)",
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
        f"parts, each timed on its own: pack_channels {pack_s * 1e3:.0f} ms; save_snapshot "
        f"(encode + disk) {save_s * 1e3:.0f} ms; load_snapshot (read + CRC + header) "
        f"{file_load_s * 1e3:.0f} ms; park (check + index) "
        f"{(restore_s - file_load_s) * 1e3:.0f} ms"
    )
    print(
        f"unpark: each channel unpacked at its first use after a restore, "
        f"{unpark_s / args.channels * 1e6:.1f} µs per channel ({unpark_s * 1e3:.0f} ms for "
        f"all; a new Channel() is {new_s / args.channels * 1e6:.1f} µs)"
    )
    del packed
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
