"""The demo runs end to end on the embedded store (a shortened day to keep the suite fast)."""

from __future__ import annotations

import io
import re
from pathlib import Path

import pyarrow.parquet as pq

from featurestore.cli import main
from replay.demo import run_demo


def test_demo_end_to_end(tmp_path: Path) -> None:
    out = io.StringIO()
    assert run_demo(out_dir=tmp_path, seed=11, vehicles=40, hours=10.0, stream=out) == 0
    text = out.getvalue()
    m = re.search(r"messages: ([\d,]+) received, ([\d,]+) accepted .*?, ([\d,]+) rejected", text)
    assert m, text
    received, accepted, rejected = (int(g.replace(",", "")) for g in m.groups())
    lines = sum(1 for _ in open(tmp_path / "day.jsonl", "rb"))
    assert received == lines and accepted + rejected == received
    for reason in ("malformed", "duplicate", "too_late", "from_future", "invalid:lat"):
        assert f"rejected {reason}" in text
    dead = pq.read_table(tmp_path / "dead-letters.parquet")
    assert dead.num_rows == rejected
    trips = pq.read_table(tmp_path / "trips.parquet")
    n_trips = int(re.search(r"training set: ([\d,]+) completed trips", text).group(1)
                  .replace(",", ""))
    assert trips.num_rows == n_trips > 0
    assert (trips.column("duration_s").to_numpy() > 0).all()
    assert "busiest cells by pickups" in text and "[cell station" in text
    page = (tmp_path / "pickups.html").read_text()
    assert page.count("<polygon") >= 5 and "http://" not in page.replace(
        "http://www.w3.org/2000/svg", "")


def test_demo_command_help(capsys) -> None:  # type: ignore[no-untyped-def]
    import pytest

    with pytest.raises(SystemExit) as e:
        main(["demo", "--help"])
    assert e.value.code == 0
    assert "--out-dir" in capsys.readouterr().out
