"""`vservo bench` (vservo_node/bench/): the table's rows exist and are consistent. No timing is
asserted (speed goals live in the benchmark's printed figures, DEVELOPERS.md)."""
import json

from vservo_node.bench import suite


def test_servo_rows_cover_every_arm_and_point_count_and_the_table_prints():
    result = suite.run_suite(parts=("servo",), ticks=30)
    names = [r["row"] for r in result["rows"]]
    for joints in (6, 7):
        for n in (4, 16, 64):
            assert f"Servo.observe {joints} joints N={n}" in names
            assert f"Servo.command {joints} joints N={n}" in names
    for r in result["rows"]:
        if "cost per point" in r["row"]:
            assert r["n"] == 1 and r["unit"] == "us/pt"
            continue
        assert r["n"] == 30 and 0 < r["median"] <= r["p95"]
        assert ("met" in r) == (r["goal"] is not None)
    text = suite.format_table(result)
    assert "load average before" in text and text.count("| servo ") == 20
    assert sum("cost per point" in n for n in names) == 4
    json.dumps(result)           # the --json output is plain JSON


def test_vision_rows_time_detection_and_a_windowed_track(monkeypatch):
    monkeypatch.setattr("vservo_node.bench.vision_rows.SIZES", ((640, 480),))
    rows = suite.vision_rows(frames=10)
    assert len(rows) == 6         # three target kinds, detect + track each
    for r in rows:
        assert r["n"] >= 9 and r["median"] > 0
    assert all("100 % of frames windowed" in r["note"] for r in rows if r["row"].endswith("track"))
