"""`loadrun calibrate` against the bundled mock: rising stream counts, receive error per level."""

from __future__ import annotations

import pytest

from loadrun.calibrate import CalibrationSettings, calibrate


@pytest.mark.slow
def test_calibration_reports_each_level_and_a_verdict() -> None:
    rows, verdict = calibrate(CalibrationSettings(levels=(5, 20), seconds_per_level=1.5, limit_ms=1.0))
    assert rows[0]["streams"] == 5
    for row in rows:
        # The "wide" engine paces every stream at 50 tokens/s (20 ms steps).
        assert row["events_per_s"] == pytest.approx(50 * row["streams"], rel=0.15)
        assert row["receive_p99_ms"] is not None and row["receive_p99_ms"] >= 0
    assert "streams" in verdict and "p99" in verdict
