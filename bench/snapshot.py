"""Time to write and restore the state of many channels, against plain json on the same dicts.

`PYTHONPATH=daemon python bench/snapshot.py [--channels 10000] [--repeats 5]`

In-process, as `zeroline.service.Service.snapshot` / `restore` do it: 10,000 channels at
p = 6 are warmed with a few readings each; a write is `Channel.to_state` of every channel,
`json.dumps` of each entry, then `StateStore.save_snapshot` (one file, fsync, rename,
directory fsync); a restore is `StateStore.load_snapshot`, then a new `Channel` per entry
and `Channel.load_state`. The baseline, in the same run, is `json.dumps` / `json.loads` of
the same list of state dicts as one document, with no disk and no objects rebuilt: the
floor of any JSON snapshot. Each timing is the median of `repeats`.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from collections.abc import Callable

from common import machine, payload, table, temporary_directory, write_config
from zeroline.channel import Channel, Sample
from zeroline.config import load_config
from zeroline.replay import resolve_channel
from zeroline.state import StateStore

WARM_READINGS = 5


def timed(action: Callable[[], object], repeats: int) -> tuple[float, object]:
    times, result = [], None
    for _ in range(repeats):
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

    def write() -> int:
        texts = {
            name: json.dumps(
                {"template": template.name, "wildcards": [name[:-4]], "state": channel.to_state()}
            )
            for name, channel in channels.items()
        }
        return store.save_snapshot(texts, {"journal_seq": 0, "saved_at": time.time()})

    def restore() -> int:
        document = store.load_snapshot()
        assert document is not None
        for name, entry in document["channels"].items():
            Channel(template, name).load_state(entry["state"])
        return len(document["channels"])

    states = [channel.to_state() for channel in channels.values()]
    write_s, written = timed(write, args.repeats)
    size = int(str(written))
    restore_s, restored = timed(restore, args.repeats)
    assert restored == args.channels, restored
    to_state_s, _ = timed(lambda: [c.to_state() for c in channels.values()], args.repeats)
    dumps_s, text = timed(lambda: json.dumps(states), args.repeats)
    loads_s, _ = timed(lambda: json.loads(str(text)), args.repeats)
    loaded = store.load_snapshot()
    assert loaded is not None
    entries = list(loaded["channels"].items())
    new_s, _ = timed(lambda: [Channel(template, n) for n, _ in entries], args.repeats)
    file_load_s, _ = timed(store.load_snapshot, args.repeats)
    rows = [
        [
            "write (to_state + dumps + save_snapshot)",
            f"{write_s * 1e3:.0f}",
            f"{dumps_s * 1e3:.0f}",
            f"{write_s / dumps_s:.1f}",
            "<= 200 ms",
        ],
        [
            "restore (load_snapshot + Channel + load_state)",
            f"{restore_s * 1e3:.0f}",
            f"{loads_s * 1e3:.0f}",
            f"{restore_s / loads_s:.1f}",
            "<= 200 ms",
        ],
    ]
    print(
        f"\n{args.channels} channels at p = 6, snapshot {size:,} bytes "
        f"({size / args.channels:,.0f} per channel), median of {args.repeats}"
    )
    print(table(["step", "zeroline ms", "json baseline ms", "ratio", "target"], rows))
    print(
        f"parts: to_state of all {to_state_s * 1e3:.0f} ms; load_snapshot (read + json + "
        f"checks) {file_load_s * 1e3:.0f} ms; Channel() of all {new_s * 1e3:.0f} ms"
    )
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
