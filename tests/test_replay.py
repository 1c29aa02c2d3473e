"""The replay tool: formats, ordering, determinism, dead letters, labels and trips, the CLI."""

from __future__ import annotations

import hashlib
import json
import random
from pathlib import Path

import h3
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from featurestore.cli import main
from replay.ordering import OrderError
from replay.readers import InputError
from replay.training import replay_labels, replay_trips

T0 = 1_780_272_000.0  # 2026-06-01T00:00:00Z
LAT, LON = -33.2, -20.6


def _rows(seed: int = 3, vehicles: int = 4, n: int = 60) -> list[dict]:
    rng = random.Random(seed)
    rows = []
    for v in range(vehicles):
        lat, lon, status = LAT, LON, "vacant"
        for k in range(n):
            ev = T0 + 15 * k + v
            lat += rng.uniform(-0.0005, 0.0015)
            lon += rng.uniform(-0.0005, 0.0015)
            if k % 20 == 5:
                status = "occupied"
            elif k % 20 == 15:
                status = "vacant"
            rows.append({"vehicle_id": f"veh-{v}", "event_ts": ev,
                         "arrival_ts": ev + rng.choice([0.5, 1.0, 1.0, 2.0]),
                         "lat": round(lat, 7), "lon": round(lon, 7), "status": status,
                         "speed_mps": 5.0, "trip_id": None})
    rows.sort(key=lambda r: r["arrival_ts"])
    return rows


def _write(rows: list[dict], path: Path, broken: list[bytes] = ()) -> Path:
    if path.suffix == ".jsonl":
        with open(path, "wb") as fh:
            for r in rows:
                fh.write(json.dumps({k: v for k, v in r.items() if v is not None}).encode()
                         + b"\n")
            for b in broken:
                fh.write(b + b"\n")
    elif path.suffix == ".csv":
        pacsv.write_csv(pa.Table.from_pylist(rows), path)
    else:
        pq.write_table(pa.Table.from_pylist(rows), path)
    return path


def _digest(path: Path) -> str:
    return hashlib.sha256(pq.read_table(path).to_pandas().to_csv().encode()).hexdigest()


def test_same_training_set_from_every_format(tmp_path: Path) -> None:
    rows = _rows()
    digests = set()
    for suffix in (".jsonl", ".csv", ".parquet"):
        src = _write(rows, tmp_path / f"in{suffix}")
        s = replay_trips([src], tmp_path / f"out{suffix}.parquet")
        assert s.training_rows == 12  # 4 vehicles x 3 completed trips (k = 5..15, 25..35, 45..55)
        digests.add(_digest(tmp_path / f"out{suffix}.parquet"))
    assert len(digests) == 1


def test_bit_for_bit_deterministic(tmp_path: Path) -> None:
    src = _write(_rows(), tmp_path / "in.jsonl")
    replay_trips([src], tmp_path / "a.parquet")
    replay_trips([src], tmp_path / "b.parquet")
    assert (tmp_path / "a.parquet").read_bytes() == (tmp_path / "b.parquet").read_bytes()


def test_dead_letters_lose_nothing(tmp_path: Path) -> None:
    rows = _rows()
    again = dict(rows[10])
    rows.append(again)  # an exact duplicate
    rows.sort(key=lambda r: r["arrival_ts"])
    broken = [b"{oops", b"[]", b'{"vehicle_id": "x", "event_ts": 1780272000, "lat": 95, '
              b'"lon": 1, "status": "vacant", "arrival_ts": 1780272001}']
    src = _write(rows, tmp_path / "in.jsonl", broken)
    s = replay_trips([src], tmp_path / "t.parquet", dead_letters=tmp_path / "dl.parquet")
    e = s.stats
    assert e["received"] == len(rows) + 3
    assert e["accepted"] + e["rejected_total"] == e["received"]
    assert e["rejected"] == {"duplicate": 1, "invalid:lat": 1, "malformed": 2}
    dl = pq.read_table(tmp_path / "dl.parquet").to_pylist()
    assert sorted(d["reason"] for d in dl) == ["duplicate", "invalid:lat", "malformed",
                                               "malformed"]
    raws = {d["raw"] for d in dl}
    assert set(broken) <= raws
    dup = next(d for d in dl if d["reason"] == "duplicate")
    line = json.dumps({k: v for k, v in again.items() if v is not None}).encode()
    assert dup["raw"] == line  # the duplicate's own line, byte for byte


def test_unsorted_input_needs_sort(tmp_path: Path) -> None:
    rows = _rows()
    rng = random.Random(9)
    shuffled = rows[:]
    rng.shuffle(shuffled)
    src = _write(shuffled, tmp_path / "in.parquet")
    ref = _write(rows, tmp_path / "ref.parquet")
    replay_trips([ref], tmp_path / "ref_out.parquet")
    # small inputs sort in memory; large ones spill sorted runs (run_rows forces it here)
    replay_trips([src], tmp_path / "sorted_out.parquet", sort=True)
    assert _digest(tmp_path / "sorted_out.parquet") == _digest(tmp_path / "ref_out.parquet")


def test_order_error_when_streamed_rows_go_back_in_time() -> None:
    from featurestore.schema import Fix
    from replay.ordering import arrival_order
    from replay.readers import Item

    def item(i: int, arr: int) -> Item:
        return Item(0, i, Fix("v", arr, 0.0, 0.0, "vacant", arr))

    items = [item(i, 1_780_272_000_000 + i) for i in range(10)] + [item(10, 1_780_272_000_000)]
    with pytest.raises(OrderError, match="--sort"):
        list(arrival_order(items, run_rows=4))
    got = list(arrival_order(items, run_rows=4, force_sort=True))
    assert [it.row for it in got] == [0, 10, 1, 2, 3, 4, 5, 6, 7, 8, 9]


def test_spilled_runs_merge_in_order() -> None:
    from featurestore.schema import Fix
    from replay.ordering import arrival_order
    from replay.readers import Item

    rng = random.Random(4)
    arr = [1_780_272_000_000 + rng.randrange(50) for _ in range(200)]
    items = [Item(0, i, Fix("v", a, 0.0, 0.0, "vacant", a)) for i, a in enumerate(arr)]
    got = [(it.arrival_ms, it.row) for it in arrival_order(items, run_rows=16, force_sort=True)]
    assert got == sorted((a, i) for i, a in enumerate(arr))


def test_assume_delay(tmp_path: Path) -> None:
    rows = [{k: v for k, v in r.items() if k != "arrival_ts"} for r in _rows()]
    src = _write(rows, tmp_path / "in.parquet")
    with pytest.raises(InputError, match="--assume-delay"):
        replay_trips([src], tmp_path / "t.parquet")
    s = replay_trips([src], tmp_path / "t.parquet", assume_delay_s=2.0, sort=True)
    assert s.training_rows == 12
    t = pq.read_table(tmp_path / "t.parquet").to_pylist()
    assert all((r["pickup_arrival_ts"] - r["pickup_ts"]).total_seconds() == 2.0 for r in t)


def test_labels_for_every_key_kind(tmp_path: Path) -> None:
    rows = _rows()
    src = _write(rows, tmp_path / "in.parquet")
    first = rows[0]
    cell = h3.latlng_to_cell(first["lat"], first["lon"], 8)
    far = h3.latlng_to_cell(10.0, 10.0, 8)
    labels = pa.Table.from_pylist([
        {"ts": first["arrival_ts"], "vehicle_id": first["vehicle_id"], "cell": cell.upper(),
         "y": 1},
        {"ts": first["arrival_ts"] - 0.001, "vehicle_id": first["vehicle_id"], "cell": cell,
         "y": 2},
        {"ts": T0 + 3600, "vehicle_id": "never-seen", "cell": far, "y": 3},
    ])
    pq.write_table(labels, tmp_path / "labels.parquet")
    replay_labels([src], tmp_path / "labels.parquet", tmp_path / "out.parquet")
    out = pq.read_table(tmp_path / "out.parquet").to_pylist()
    assert [r["y"] for r in out] == [1, 2, 3]
    assert out[0]["vehicle_cell"] == cell and out[0]["cell_fixes_5m"] == 1
    assert out[0]["vehicle_fix_age_s"] == pytest.approx(first["arrival_ts"] - first["event_ts"])
    # one millisecond before the first arrival nothing is known
    assert out[1]["vehicle_cell"] is None and out[1]["cell_fixes_5m"] == 0
    assert out[2]["vehicle_cell"] is None and out[2]["trip_fixes"] == 0
    assert out[2]["cell_pickups_60m"] == 0


def test_label_errors_are_readable(tmp_path: Path) -> None:
    src = _write(_rows(), tmp_path / "in.parquet")
    pq.write_table(pa.table({"ts": [T0], "cell": ["not-a-cell"]}), tmp_path / "l.parquet")
    with pytest.raises(InputError, match="row 1: cell 'not-a-cell' is not an H3 cell"):
        replay_labels([src], tmp_path / "l.parquet", tmp_path / "o.parquet")
    pq.write_table(pa.table({"when": [T0], "cell": ["x"]}), tmp_path / "l2.parquet")
    with pytest.raises(InputError, match="'ts' column"):
        replay_labels([src], tmp_path / "l2.parquet", tmp_path / "o.parquet")


def test_cli_replay_and_catalog(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    src = _write(_rows(), tmp_path / "in.jsonl")
    assert main(["replay", str(src), "--trips", "--out", str(tmp_path / "t.csv"),
                 "--no-progress"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["training_rows"] == 12
    assert (tmp_path / "t.csv").read_text().splitlines()[0].startswith("\"vehicle_id\"")
    assert main(["catalog", "--json"]) == 0
    cat = json.loads(capsys.readouterr().out)
    assert cat["families"]["trip"][0] == "trip_active"
    assert len(cat["features"]) == 29
    assert main(["replay", str(tmp_path / "missing.jsonl"), "--out", "x.parquet"]) == 2
    assert "no such file" in capsys.readouterr().err
    assert main(["catalog", "--cell-resolution", "99"]) == 2
    assert "cell_resolution must be 0..15" in capsys.readouterr().err


def test_env_prefix_configures(monkeypatch: pytest.MonkeyPatch,
                               capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("CELLPULSE_WINDOWS_MIN", "10,30")
    monkeypatch.setenv("CELLPULSE_RING_WINDOW_MIN", "10")
    assert main(["catalog", "--json"]) == 0
    names = json.loads(capsys.readouterr().out)["families"]["cell"]
    assert names[:2] == ["cell_pickups_10m", "cell_pickups_30m"]
    assert "cell_ring_pickups_10m" in names


def test_several_inputs_merge_by_arrival(tmp_path: Path) -> None:
    rows = _rows(seed=5)
    one = _write(rows, tmp_path / "all.parquet")
    a = _write([r for r in rows if r["vehicle_id"] in ("veh-0", "veh-2")], tmp_path / "a.jsonl")
    b = _write([r for r in rows if r["vehicle_id"] in ("veh-1", "veh-3")], tmp_path / "b.csv")
    replay_trips([one], tmp_path / "one.parquet")
    s = replay_trips([a, b], tmp_path / "two.parquet")
    assert s.stats["accepted"] == len(rows)
    key = ["vehicle_id", "pickup_ts"]
    left = pq.read_table(tmp_path / "one.parquet").to_pandas().sort_values(key)
    right = pq.read_table(tmp_path / "two.parquet").to_pandas().sort_values(key)
    assert left.reset_index(drop=True).equals(right.reset_index(drop=True))


def test_csv_dead_letter_keeps_the_cells_as_written(tmp_path: Path) -> None:
    src = tmp_path / "in.csv"
    src.write_text("vehicle_id,event_ts,arrival_ts,lat,lon,status\n"
                   "veh-1,1780272000,1780272001,-33.2,-20.6,vacant\n"
                   "veh-1,1780272015,1780272016,north,-20.6,vacant\n"
                   "veh-1,1780272030,1780272031,-33.2,-20.6,\n")
    s = replay_trips([src], tmp_path / "t.parquet", dead_letters=tmp_path / "dl.parquet")
    assert s.stats["rejected"] == {"invalid:lat": 1, "invalid:status": 1}
    dl = pq.read_table(tmp_path / "dl.parquet").to_pylist()
    assert [d["row"] for d in dl] == [1, 2]
    assert json.loads(dl[0]["raw"]) == {"vehicle_id": "veh-1", "event_ts": "1780272015",
                                        "arrival_ts": "1780272016", "lat": "north",
                                        "lon": "-20.6", "status": "vacant"}
    assert json.loads(dl[1]["raw"])["status"] == ""
    assert "required field is missing" in dl[1]["detail"]


def test_timestamp_columns_and_iso_text(tmp_path: Path) -> None:
    import datetime as dt

    utc = dt.timezone.utc
    base = dt.datetime(2026, 6, 1, tzinfo=utc)
    rows = [{"vehicle_id": "veh-1", "event_ts": base + dt.timedelta(seconds=15 * k),
             "arrival_ts": base + dt.timedelta(seconds=15 * k + 1), "lat": LAT + k / 1000,
             "lon": LON, "status": "occupied" if 2 <= k < 6 else "vacant"} for k in range(8)]
    pq.write_table(pa.Table.from_pylist(rows), tmp_path / "ts.parquet")
    s = replay_trips([tmp_path / "ts.parquet"], tmp_path / "t.parquet")
    assert s.training_rows == 1 and s.stats["rejected"] == {}
    trip = pq.read_table(tmp_path / "t.parquet").to_pylist()[0]
    assert trip["duration_s"] == 60.0 and trip["pickup_ts"] == base + dt.timedelta(seconds=30)
    iso = tmp_path / "iso.csv"
    iso.write_text("vehicle_id,event_ts,arrival_ts,lat,lon,status\n"
                   "v,2026-06-01T02:00:00+02:00,2026-06-01T00:00:01Z,-33.2,-20.6,vacant\n")
    s = replay_trips([iso], tmp_path / "t2.parquet")
    assert s.stats["accepted"] == 1
    naive = pa.table({"vehicle_id": ["v"], "event_ts": [dt.datetime(2026, 6, 1)],
                      "arrival_ts": [dt.datetime(2026, 6, 1)], "lat": [LAT], "lon": [LON],
                      "status": ["vacant"]})
    pq.write_table(naive, tmp_path / "naive.parquet")
    with pytest.raises(InputError, match="timestamp without a time zone"):
        replay_trips([tmp_path / "naive.parquet"], tmp_path / "t3.parquet")


def test_gzipped_text_inputs(tmp_path: Path) -> None:
    import gzip

    rows = _rows()
    plain = _write(rows, tmp_path / "in.jsonl")
    with gzip.open(tmp_path / "in.jsonl.gz", "wb") as fh:
        fh.write(plain.read_bytes())
    a = replay_trips([plain], tmp_path / "a.parquet")
    b = replay_trips([tmp_path / "in.jsonl.gz"], tmp_path / "b.parquet")
    assert a.stats == b.stats and b.training_rows == 12
    assert _digest(tmp_path / "a.parquet") == _digest(tmp_path / "b.parquet")


def test_failed_replay_leaves_no_partial_files(tmp_path: Path) -> None:
    rows = _rows(vehicles=2, n=30_000)  # more than one sort run (50,000 rows)
    # the first 50,000 rows are in order and stream through; the next goes back in time
    src = _write(rows[10_000:] + rows[:10_000], tmp_path / "in.jsonl")
    with pytest.raises(OrderError, match="row 50001"):
        replay_trips([src], tmp_path / "t.parquet", dead_letters=tmp_path / "d.parquet")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.jsonl"]
