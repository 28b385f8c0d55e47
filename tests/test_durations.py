"""Prometheus duration strings: ours against the real server's own parser.

Reference: Prometheus parses the ``step`` parameter of ``/api/v1/query_range`` as a float
number of seconds or a duration string (HTTP API docs, "Range queries"); the spacing of
the returned points is the server's reading of the duration. Syntax from the querying
docs ("Time durations"; units ms s m h d w y, largest first).
"""

from __future__ import annotations

import httpx
import pytest

from ratefit.models.durations import format_duration, parse_duration
from ratefit.models.errors import InputError

VALID = {"30s": 30, "5m": 300, "1h30m": 5400, "7d": 604800, "2w": 1209600, "1y": 31536000,
         "1h0m15s": 3615, "1500ms": 1.5, "90m": 5400, "1d12h": 129600}
INVALID = ["", "10", "1m1h", "5mm", "1.5h", "-5m", "5 m", "ten minutes", "0s", "1h 30m"]


@pytest.mark.parametrize(("text", "seconds"), VALID.items())
def test_valid(text, seconds):
    assert parse_duration(text) == pytest.approx(seconds)


@pytest.mark.parametrize("text", INVALID)
def test_invalid_names_the_field(text):
    with pytest.raises(InputError, match="rateWindow"):
        parse_duration(text, field="rateWindow")


@pytest.mark.parametrize("seconds", [30, 300, 5400, 604800, 3615, 1.5, 129600])
def test_format_round_trips(seconds):
    assert parse_duration(format_duration(seconds)) == pytest.approx(seconds)
    assert format_duration(5400) == "1h30m"


@pytest.mark.prometheus
def test_prometheus_reads_the_same_durations(scenario_prometheus):
    url = scenario_prometheus.url + "/api/v1/query_range"
    for text, seconds in VALID.items():
        if seconds < 30:
            continue  # keep the answer small
        r = httpx.post(url, data={"query": "time()", "start": 0, "end": 2 * seconds, "step": text})
        assert r.status_code == 200, (text, r.text)
        pts = r.json()["data"]["result"][0]["values"]
        assert [p[0] for p in pts] == [0, seconds, 2 * seconds], text
    for text in ["1m1h", "5mm", "ten", "0s", "-5m"]:
        r = httpx.post(url, data={"query": "time()", "start": 0, "end": 100, "step": text})
        assert r.status_code == 400, text  # the server refuses what we refuse
