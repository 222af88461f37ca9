"""The PromQL dashboard queries in deploy/timeseries.md run against a real VictoriaMetrics
holding points written by zeroline's own sink, and return what they promise."""

from __future__ import annotations

import json
import re
import time
import urllib.parse
import urllib.request
from pathlib import Path

import pytest

from support.victoria import VictoriaMetrics
from zeroline import tsdb

DOC = Path(__file__).resolve().parent.parent / "deploy" / "timeseries.md"


def promql_queries() -> list[str]:
    """Every `...` query in the PromQL table of deploy/timeseries.md."""
    text = DOC.read_text(encoding="utf-8")
    table = text[text.index("**PromQL**") : text.index("**Flux**")]
    return [
        q
        for row in table.splitlines()
        if row.startswith("| ") and "`" in row
        for q in re.findall(r"`([^`]+)`", row)
    ]


def _query(server: VictoriaMetrics, promql: str, at: float) -> list[dict[str, object]]:
    url = f"{server.url}/api/v1/query?" + urllib.parse.urlencode(
        {"query": promql, "time": f"{at:.3f}"}
    )
    with urllib.request.urlopen(url, timeout=10) as response:
        answer = json.loads(response.read())
    assert answer["status"] == "success", answer
    result: list[dict[str, object]] = answer["data"]["result"]
    return result


@pytest.mark.service
def test_documented_promql_queries_answer(victoria: VictoriaMetrics, tmp_path: Path) -> None:
    """Readings and an alert for channel site1-no2 are written through TimeseriesSink; each
    documented query returns data, and the values are the ones written."""
    queries = promql_queries()
    assert len(queries) >= 7, queries
    config = tsdb.TimeseriesConfig(
        url=victoria.url, org="o", bucket="b", spool_dir=tmp_path / "spool", flush_interval_s=0.1
    )
    sink = tsdb.TimeseriesSink(config)
    now = time.time() - 60
    points = [
        tsdb.reading_point(
            "site1-no2",
            round((now + i) * 1e9),
            raw=20.0 + i,
            corrected=18.0,
            baseline=2.0 + i,
            uncertainty=0.1,
            drift_rate=1e-5,
            quality=1 if i < 4 else 3,
            labels={"site": "site1"},
        )
        for i in range(5)
    ]
    points.append(
        tsdb.alert_point(
            "site1-no2",
            round((now + 2) * 1e9),
            rule="drift_limit",
            severity="warning",
            active=True,
            value=16.0,
            limit=15.0,
        )
    )
    assert sink.submit(points) == len(points)
    sink.close(timeout=20)
    victoria.force_flush()
    at = now + 5
    deadline = time.monotonic() + 20
    while not _query(victoria, queries[0], at) and time.monotonic() < deadline:
        time.sleep(0.5)
    answers = {q: _query(victoria, q, at) for q in queries}
    for query, result in answers.items():
        assert result, f"no data for {query}"
    assert float(answers[queries[0]][0]["value"][1]) == 24.0
    rate = next(q for q in queries if "86400" in q)
    assert float(answers[rate][0]["value"][1]) == pytest.approx(0.864)
    active = next(q for q in queries if "alert_active" in q)
    assert answers[active][0]["metric"]["rule"] == "drift_limit"
