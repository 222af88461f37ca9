"""Draw a replay as one PNG: what the sensor said, what zeroline learnt, what it published.

`zeroline replay ... --plot FILE.png` collects the replay's steps in a `Trace` (plain float
arrays, so a replay of millions of rows does not keep millions of objects alive) and
`draw_trace` renders three panels on one UTC time axis:

1. **raw**: the reading as received (thin grey), with the samples that taught the model
   from a reference value marked (learn mode `reference` only: in the other modes every
   sample teaches, and marking all of them would say nothing);
2. **baseline**: the learnt drift on its own scale, so a drift of a few units under a
   signal of hundreds stays visible, shaded ± one standard uncertainty; the drift limit,
   when an alert names it, as dashed lines;
3. **corrected**: the published value, shaded ± its standard uncertainty, the reference
   samples marked again (a corrected check sample should sit on the reference).

Alert events are vertical lines across all panels, one colour per rule, listed in the
legend; cleared events are drawn lighter and dashed. The caption repeats that corrected
values are advisory.

Why the baseline band is scaled when a gain is fitted: the channel's `uncertainty` is the
standard uncertainty of the *corrected* value (delta method, in corrected units). Without a
gain that is also the baseline's; with a gain, raw-unit uncertainty is |gain| × that, which
is what the baseline panel shows (the legend says so).

matplotlib is an optional extra (`pip install 'zeroline[plot]'`); it is imported only when
a plot is asked for, with the Agg backend (files only, no display needed on a gateway).
"""

from __future__ import annotations

import datetime
import importlib
import math
import os
from array import array
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from zeroline.alerts import RULE_NAMES, AlertEvent
from zeroline.errors import InputError, UserError
from zeroline.replay import Step

if TYPE_CHECKING:
    from matplotlib.axes import Axes

Series = dict[str, npt.NDArray[np.float64]]
IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]

MISSING_MATPLOTLIB = "--plot needs matplotlib: pip install 'zeroline[plot]'"
CAPTION = (
    "Corrected values are advisory: never use them for life-safety alarms, interlocks or "
    "compliance. Raw readings are always kept."
)
SECONDS_PER_DAY = 86400.0
FIGURE_SIZE = (11.0, 8.5)  # inches; at DPI this is 1320 × 1020 pixels
DPI = 120
RAW_COLOUR, BASELINE_COLOUR, CORRECTED_COLOUR = "0.45", "tab:blue", "tab:green"
REFERENCE_COLOUR = "tab:orange"
# One colour per alert rule, stable across plots so a reader learns them once.
RULE_COLOURS = dict(
    zip(
        RULE_NAMES,
        ("tab:red", "tab:purple", "tab:brown", "tab:pink", "tab:olive", "tab:cyan", "black"),
        strict=True,
    )
)


@dataclass
class Trace:
    """A replay's series for plotting, collected one step at a time.

    >>> trace = Trace(learn_mode="all")
    >>> len(trace)
    0
    """

    learn_mode: str = "all"
    time: array[float] = field(default_factory=lambda: array("d"))
    raw: array[float] = field(default_factory=lambda: array("d"))
    baseline: array[float] = field(default_factory=lambda: array("d"))
    corrected: array[float] = field(default_factory=lambda: array("d"))
    uncertainty: array[float] = field(default_factory=lambda: array("d"))
    gain: array[float] = field(default_factory=lambda: array("d"))
    not_ok: array[int] = field(default_factory=lambda: array("b"))  # 1 where quality != ok
    not_ok_kinds: set[str] = field(default_factory=set)
    reference_rows: array[int] = field(default_factory=lambda: array("q"))
    events: list[AlertEvent] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.time)

    def add(self, step: Step) -> None:
        """Append one replay step (a reading, or the alert clears of a control event)."""
        self.events.extend(step.events)
        result = step.result
        if result is None:
            return
        if result.learned and self.learn_mode == "reference":
            self.reference_rows.append(len(self.time))
        self.time.append(result.time / SECONDS_PER_DAY)  # matplotlib dates: days since 1970
        self.raw.append(result.raw)
        self.baseline.append(_nan_if_none(result.baseline))
        self.corrected.append(_nan_if_none(result.corrected))
        self.uncertainty.append(_nan_if_none(result.uncertainty))
        self.gain.append(_nan_if_none(result.gain, default=1.0))
        self.not_ok.append(result.quality != "ok")
        if result.quality != "ok":
            self.not_ok_kinds.add(result.quality)


def _nan_if_none(value: float | None, default: float = math.nan) -> float:
    return default if value is None else float(value)


def require_matplotlib() -> None:
    """Fail early (before a long replay) when the plotting extra is not installed."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise UserError(MISSING_MATPLOTLIB) from None


def check_plot_path(path: str | Path) -> None:
    """Fail early when the picture could not be written: its directory is missing or
    read-only (better now than after a long replay)."""
    folder = Path(path).resolve().parent
    if not folder.is_dir():
        raise InputError(f"{path}: cannot write the plot (no directory {folder})")
    if not os.access(folder, os.W_OK):
        raise InputError(f"{path}: cannot write the plot (directory {folder} is read-only)")


def plot_replay(
    path: str | Path, channel_name: str, steps: Iterable[Step], *, learn_mode: str = "all"
) -> None:
    """Draw the replay `steps` of `channel_name` into the PNG file `path`.

    `learn_mode` is the channel's `learn.mode`; with "reference" the samples that taught
    the model are marked.
    """
    trace = Trace(learn_mode=learn_mode)
    for step in steps:
        trace.add(step)
    draw_trace(path, channel_name, trace)


def draw_trace(path: str | Path, channel_name: str, trace: Trace) -> None:
    """Render a collected `Trace` into the PNG file `path` (see the module docstring)."""
    require_matplotlib()
    if not trace:
        raise InputError(f"{path}: nothing to plot: the replay processed no reading")
    import matplotlib

    matplotlib.use("Agg")  # files only: a gateway has no display
    import matplotlib.pyplot as plt

    series = {name: np.frombuffer(getattr(trace, name)) for name in _SERIES}
    refs = np.frombuffer(trace.reference_rows, dtype=np.int64)
    not_ok = np.frombuffer(trace.not_ok, dtype=np.int8).astype(bool)
    figure, (raw_axes, baseline_axes, corrected_axes) = plt.subplots(
        3, 1, sharex=True, figsize=FIGURE_SIZE, height_ratios=(1.0, 1.0, 1.2), layout="constrained"
    )
    try:
        _draw_raw(raw_axes, series, refs)
        _draw_baseline(baseline_axes, series, trace.events)
        _draw_corrected(corrected_axes, series, refs)
        _shade_quality(corrected_axes, series["time"], not_ok, sorted(trace.not_ok_kinds))
        for axes in (raw_axes, baseline_axes, corrected_axes):
            _draw_alerts(axes, trace.events)
            axes.grid(True, color="0.9", linewidth=0.6)
        _legend_for_alerts(baseline_axes, trace.events)
        _time_axis(corrected_axes)
        figure.suptitle(f"zeroline replay: {channel_name}", fontsize=13, fontweight="bold")
        figure.supxlabel(CAPTION, fontsize=8.5, color="0.3", style="italic")
        try:
            figure.savefig(path, dpi=DPI, format="png")
        except OSError as error:
            raise InputError(f"{path}: cannot write the plot ({error.strerror})") from None
    finally:
        plt.close(figure)


_SERIES = ("time", "raw", "baseline", "corrected", "uncertainty", "gain")


def _line_rows(size: int, refs: IntArray) -> IntArray | slice:
    """The rows the series *lines* are drawn through.

    Reference samples are often not like the others (a probe dipped in a buffer, a zero gas
    check): joined into the line they draw a spike per check and hide the signal. They are
    shown as markers instead. When most rows are reference rows (a co-located reference
    instrument), the line goes through every row.
    """
    if refs.size == 0 or refs.size * 2 > size:
        return slice(None)
    keep = np.ones(size, dtype=bool)
    keep[refs] = False
    rows: IntArray = np.flatnonzero(keep)
    return rows


def _marker_size(count: int) -> float:
    """Smaller reference markers when there are many, so they do not bury the line."""
    return 3.5 if count <= 100 else 2.0


def _legend_outside(axes: Axes) -> None:
    axes.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)


def _mark_references(
    axes: Axes, time: FloatArray, values: FloatArray, refs: IntArray, label: str
) -> None:
    """Dots on the samples that had a fresh reference value (none: nothing drawn)."""
    if refs.size:
        axes.plot(
            time[refs],
            values[refs],
            "o",
            color=REFERENCE_COLOUR,
            markersize=_marker_size(refs.size),
            label=label,
        )


def _draw_raw(axes: Axes, series: Series, refs: IntArray) -> None:
    time, raw = series["time"], series["raw"]
    rows = _line_rows(time.size, refs)
    axes.plot(time[rows], raw[rows], color=RAW_COLOUR, linewidth=0.6, label="raw")
    _mark_references(axes, time, raw, refs, "reference sample\n(taught the model)")
    axes.set_ylabel("raw")
    _legend_outside(axes)


def _draw_baseline(axes: Axes, series: Series, events: list[AlertEvent]) -> None:
    time, baseline, gain = series["time"], series["baseline"], series["gain"]
    has_gain = bool(np.any(gain != 1.0))
    band = series["uncertainty"] * np.abs(gain)
    label = "± standard uncertainty" + ("\n(× |gain|, raw units)" if has_gain else "")
    axes.fill_between(
        time, baseline - band, baseline + band, color=BASELINE_COLOUR, alpha=0.25, label=label
    )
    axes.plot(time, baseline, color=BASELINE_COLOUR, linewidth=1.2, label="baseline (drift)")
    limits = sorted({e.limit for e in events if e.rule == "drift_limit" and e.limit is not None})
    for k, limit in enumerate(limits):
        for sign in (1.0, -1.0):
            axes.axhline(
                sign * limit,
                color=RULE_COLOURS["drift_limit"],
                linestyle=":",
                linewidth=1.0,
                label="± drift limit" if k == 0 and sign > 0 else None,
            )
    axes.set_ylabel("baseline")
    _legend_outside(axes)


def _draw_corrected(axes: Axes, series: Series, refs: IntArray) -> None:
    time, corrected, band = series["time"], series["corrected"], series["uncertainty"]
    rows = _line_rows(time.size, refs)
    axes.fill_between(
        time[rows],
        (corrected - band)[rows],
        (corrected + band)[rows],
        color=CORRECTED_COLOUR,
        alpha=0.25,
        label="± standard uncertainty",
    )
    axes.plot(time[rows], corrected[rows], color=CORRECTED_COLOUR, linewidth=0.8, label="corrected")
    _mark_references(axes, time, corrected, refs, "reference sample")
    axes.set_ylabel("corrected (advisory)")
    _legend_outside(axes)


def _shade_quality(axes: Axes, time: FloatArray, not_ok: BoolArray, kinds: list[str]) -> None:
    """Grey spans where the published quality was not `ok` (learning, extrapolating…)."""
    label = f"quality not ok\n({', '.join(kinds)})"
    for k, (start, end) in enumerate(_runs(time, not_ok)):
        axes.axvspan(
            start, end, color="0.85", alpha=0.5, linewidth=0, label=label if k == 0 else None
        )
    _legend_outside(axes)


def _runs(time: FloatArray, flag: BoolArray) -> list[tuple[float, float]]:
    """(start, end) times of each run of consecutive rows where `flag` is set."""
    if not flag.any():
        return []
    edges = np.diff(np.concatenate([[0], flag.astype(np.int8), [0]]))
    starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1
    return [(float(time[s]), float(time[e])) for s, e in zip(starts, ends, strict=True)]


def _draw_alerts(axes: Axes, events: list[AlertEvent]) -> None:
    for event in events:
        raised = event.state == "raised"
        axes.axvline(
            event.time / SECONDS_PER_DAY,
            color=RULE_COLOURS[event.rule],
            linestyle="-" if raised else "--",
            linewidth=1.2 if raised else 0.9,
            alpha=1.0 if raised else 0.4,
        )


def _legend_for_alerts(axes: Axes, events: list[AlertEvent]) -> None:
    """One legend entry per rule and state that occurred, beside the baseline panel's."""
    if not events:
        return
    from matplotlib.lines import Line2D

    handles = []
    for rule in RULE_NAMES:
        states = {e.state for e in events if e.rule == rule}
        for state in ("raised", "cleared"):
            if state in states:
                raised = state == "raised"
                handles.append(
                    Line2D(
                        [],
                        [],
                        color=RULE_COLOURS[rule],
                        linestyle="-" if raised else "--",
                        alpha=1.0 if raised else 0.4,
                        label=f"{rule} {state}",
                    )
                )
    first = axes.get_legend()
    axes.legend(
        handles=handles,
        loc="lower left",
        bbox_to_anchor=(1.01, 0.0),
        fontsize=8,
        frameon=False,
        title="alerts",
        title_fontsize=8,
    )
    if first is not None:
        axes.add_artist(first)  # keep the series legend as well


def _time_axis(axes: Axes) -> None:
    # matplotlib.dates has no annotations for these constructors: use them untyped rather
    # than an ignore that would depend on the installed matplotlib version.
    dates: Any = importlib.import_module("matplotlib.dates")
    locator = dates.AutoDateLocator(tz=datetime.timezone.utc)
    axes.xaxis.set_major_locator(locator)
    axes.xaxis.set_major_formatter(dates.ConciseDateFormatter(locator, tz=datetime.timezone.utc))
    axes.set_xlabel("time (UTC)")


__all__ = [
    "MISSING_MATPLOTLIB",
    "Trace",
    "check_plot_path",
    "draw_trace",
    "plot_replay",
    "require_matplotlib",
]
