"""`zeroline replay --plot`: a real PNG with every series drawn, and one-line errors.

The picture is checked through matplotlib's own PNG reader (an independent decoder of the
file we wrote) and by counting pixels of each series' colour, so a plot that lost a series
fails. The example log is our own invention (config/examples/make_logs.py).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from zeroline import cli
from zeroline.alerts import AlertEvent
from zeroline.channel import Corrected
from zeroline.errors import InputError, UserError
from zeroline.plot import MISSING_MATPLOTLIB, Trace, draw_trace, require_matplotlib
from zeroline.replay import Step

EXAMPLES = Path(__file__).resolve().parent.parent / "config" / "examples"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # RFC 2083 / ISO 15948, section 3.1


def _replay_args(out_dir: Path, plot: Path) -> list[str]:
    return [
        "replay",
        str(EXAMPLES / "ph_river_log.csv"),
        "-c",
        str(EXAMPLES / "ph_river.yaml"),
        "--channel",
        "river-ph",
        "-o",
        str(out_dir / "out.csv"),
        "--alerts",
        str(out_dir / "alerts.jsonl"),
        "--plot",
        str(plot),
    ]


@pytest.fixture(scope="module")
def ph_plot(tmp_path_factory: pytest.TempPathFactory) -> Path:
    import matplotlib  # noqa: F401  (in the test extra: a missing one is a failure, not a skip)

    out_dir = tmp_path_factory.mktemp("plot")
    plot = out_dir / "ph.png"
    assert cli.main(_replay_args(out_dir, plot)) == 0
    return plot


def _pixels(path: Path) -> np.ndarray:
    import matplotlib.image

    image: np.ndarray = matplotlib.image.imread(str(path))
    return image[..., :3]  # RGB, floats in [0, 1]


def _colour_count(pixels: np.ndarray, colour: str, tolerance: float = 0.06) -> int:
    from matplotlib.colors import to_rgb

    distance = np.abs(pixels - np.array(to_rgb(colour))).max(axis=-1)
    return int((distance < tolerance).sum())


def test_plot_is_a_png_of_sane_size(ph_plot: Path) -> None:
    """The file starts with the PNG signature and decodes to a landscape picture of a
    readable size (not a thumbnail, not a poster)."""
    assert ph_plot.read_bytes()[:8] == PNG_SIGNATURE
    height, width, _ = _pixels(ph_plot).shape
    assert 800 <= width <= 3000 and 600 <= height <= 2500
    assert width > height


def test_plot_is_not_blank_and_draws_every_series(ph_plot: Path) -> None:
    """The picture has contrast, and each series' colour appears: raw grey, baseline blue,
    corrected green, reference-sample orange and the forecast alert's line (the pH log
    raises a forecast alert, see its --alerts output)."""
    pixels = _pixels(ph_plot)
    assert float(pixels.var()) > 0.01
    white = (pixels > 0.98).all(axis=-1).mean()
    assert 0.3 < white < 0.97  # mostly background, but far from empty
    for colour, at_least in [
        ("0.45", 500),  # raw
        ("tab:blue", 500),  # baseline
        ("tab:green", 500),  # corrected
        ("tab:orange", 100),  # 16 buffer checks, drawn twice
        ("tab:brown", 100),  # the forecast alert's vertical lines
    ]:
        assert _colour_count(pixels, colour) >= at_least, colour


def test_alerts_file_names_the_alert_the_plot_draws(ph_plot: Path) -> None:
    """The brown line is the forecast alert: the replay's alert file has it."""
    alerts = (ph_plot.parent / "alerts.jsonl").read_text().splitlines()
    assert any('"rule": "forecast"' in line for line in alerts)


def _corrected(time: float, learned: bool, quality: str = "ok") -> Corrected:
    return Corrected(
        time=time,
        raw=1.0,
        corrected=0.5,
        baseline=0.5,
        uncertainty=0.1,
        quality=quality,
        quality_code=1,
        flags=(),
        gain=None,
        drift_rate=0.0,
        learned=learned,
    )


def test_trace_marks_reference_rows_only_in_reference_mode() -> None:
    """Rows that taught the model are reference samples only when the mode is reference;
    a control step adds its alert clears but no row."""
    event = AlertEvent(1.0, "c", "drift_limit", "cleared", 1.0, 2.0, "warning", "cleared")
    steps = [
        Step(0, _corrected(0.0, learned=True)),
        Step(1, _corrected(60.0, learned=False, quality="learning")),
        Step(2, None, [event]),
        Step(3, _corrected(120.0, learned=True)),
    ]
    reference, every = Trace(learn_mode="reference"), Trace(learn_mode="all")
    for step in steps:
        reference.add(step)
        every.add(step)
    assert list(reference.reference_rows) == [0, 2]
    assert list(every.reference_rows) == []
    assert len(reference) == 3 and reference.events == [event]
    assert list(reference.not_ok) == [0, 1, 0] and reference.not_ok_kinds == {"learning"}


def test_empty_trace_is_a_user_error(tmp_path: Path) -> None:
    """Nothing processed: a one-line error, no empty picture."""
    import matplotlib  # noqa: F401  (in the test extra: a missing one is a failure, not a skip)

    with pytest.raises(InputError, match="nothing to plot"):
        draw_trace(tmp_path / "x.png", "c", Trace())
    assert not (tmp_path / "x.png").exists()


def test_unwritable_plot_path_is_one_line_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A plot path in a missing directory: exit 2, one line naming the file."""
    import matplotlib  # noqa: F401  (in the test extra: a missing one is a failure, not a skip)

    bad = tmp_path / "missing" / "x.png"
    assert cli.main(_replay_args(tmp_path, bad)) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(bad) in err[0] and "cannot write the plot" in err[0]


def test_missing_matplotlib_is_one_line_before_any_work(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Without matplotlib, --plot fails at once with the install hint (no output file is
    started), whether or not it is installed here."""
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib` fail
    with pytest.raises(UserError, match="zeroline\\[plot\\]"):
        require_matplotlib()
    assert cli.main(_replay_args(tmp_path, tmp_path / "x.png")) == 2
    assert capsys.readouterr().err.strip() == f"zeroline: error: {MISSING_MATPLOTLIB}"
    assert not (tmp_path / "out.csv").exists()
