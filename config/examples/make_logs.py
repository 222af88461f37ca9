"""Regenerate the example logs in this folder from the simulated scenarios (seeded).

.venv/bin/python config/examples/make_logs.py
"""

from pathlib import Path

from zeroline import simulate

HERE = Path(__file__).parent

ph = simulate.ph_river()
ph["check"] = ph.pop("check_value")  # a replay reads each input from a column of its name
simulate.write_csv(HERE / "ph_river_log.csv", ph, ["time", "value", "temperature", "check"])
simulate.write_csv(
    HERE / "no2_station_log.csv",
    simulate.no2_station(days=30),
    ["time", "value", "temperature", "reference"],
)
simulate.write_csv(
    HERE / "load_cell_log.csv", simulate.load_cell(), ["time", "value", "temperature"]
)
