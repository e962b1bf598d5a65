"""`modetick export --format csv` on a real simulated run log, read back by other readers."""
import csv
import json

import numpy as np
import pytest

from daq.cli import main
from daq.runlog import RunLog

SHORT = ["--set", "sweep.settle_s=0", "--set", "sweep.start=1000", "--set", "sweep.stop=2600"]


def cli(capsys, *args):
    capsys.readouterr()
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def exported(capsys, tmp_path):
    log = tmp_path / "run.db"
    assert cli(capsys, "sweep", "--log", log, "--json", *SHORT)[0] == 0
    code, out, _ = cli(capsys, "export", log, "--format", "csv", "--out", tmp_path / "csv")
    assert code == 0
    return log, tmp_path / "csv", out


def _rows(path):
    with open(path, newline="") as fh:      # Python's csv module as the outside reader
        return list(csv.DictReader(fh))


def test_export_files_and_round_trip(capsys, exported):
    log_path, out, stdout = exported
    log = RunLog.open(log_path)
    s, events = log.read_samples(), log.events()
    log.close()
    for name in ("samples.csv", "events.csv", "modes.csv"):
        assert str(out / name) in stdout

    # samples.csv: every logged sample, floats bit for bit.
    rows = _rows(out / "samples.csv")
    assert len(rows) == len(s)
    assert list(rows[0])[:6] == ["time_s", "position", "direction", "pass", "intensity", "spread"]
    col = lambda k, f: np.array([f(r[k]) for r in rows])  # noqa: E731
    assert np.array_equal(col("position", int), s.position_steps)
    assert np.array_equal(col("direction", int), s.direction)
    assert np.array_equal(col("pass", int), s.pass_index)
    assert np.array_equal(col("intensity", float), s.value)
    assert np.array_equal(col("spread", float), s.spread)
    assert np.max(np.abs(col("time_s", float) - s.t_s)) < 1e-9

    # events.csv: the log's events in order.
    ev = _rows(out / "events.csv")
    assert [r["kind"] for r in ev] == [e["kind"] for e in events]
    blips = [e for e in events if e["kind"] == "blip"]
    assert blips and [float(r["position"]) for r in ev if r["kind"] == "blip"] == [e["pos"] for e in blips]

    # modes.csv: the mode map of analyze --json, row for row.
    code, stdout, _ = cli(capsys, "analyze", log_path, "--json")
    from_log = json.loads(stdout)
    modes = _rows(out / "modes.csv")
    assert len(modes) == len(from_log["mode_map"]) == from_log["modes"]
    assert [int(r["mode"]) for r in modes] == [m["mode"] for m in from_log["mode_map"]]
    assert [float(r["centre_steps"]) for r in modes] == [m["centre_steps"] for m in from_log["mode_map"]]
    # The same columns as `modetick modes --csv`: its reader takes the export.
    from daq.cmd_modes import read_csv
    assert read_csv(out / "modes.csv") == from_log["mode_map"]

    # analyze reads the export back and finds the same modes.
    code, stdout, _ = cli(capsys, "analyze", out / "samples.csv", "--json")
    from_csv = json.loads(stdout)
    assert code == 0 and from_csv["modes"] == from_log["modes"]
    assert from_csv["crossings"] == from_log["crossings"]
    assert from_csv["spacing_steps"] == pytest.approx(from_log["spacing_steps"], rel=1e-12)
    assert [m["mode"] for m in from_csv["mode_map"]] == [m["mode"] for m in from_log["mode_map"]]


@pytest.mark.parametrize("fmt", ["hdf5", "xlsx"])
def test_unknown_format_exits_2_with_one_line(capsys, tmp_path, fmt):
    code, _, err = cli(capsys, "export", tmp_path / "any.db", "--format", fmt, "--out", tmp_path / "x")
    assert code == 2 and len(err.strip().splitlines()) == 1 and "csv" in err
    assert not (tmp_path / "x").exists()


def test_not_a_log_exits_2(capsys, tmp_path):
    bad = tmp_path / "trace.csv"
    bad.write_text("position,intensity\n1,2\n")
    code, _, err = cli(capsys, "export", bad, "--out", tmp_path / "x")
    assert code == 2 and len(err.strip().splitlines()) == 1 and err.startswith("modetick: ")
    assert not (tmp_path / "x").exists()


def test_aux_channels_become_columns(tmp_path):
    # A log written through the real run log (SQLite) with an aux channel that starts
    # mid-run and a name that is not CSV-friendly.
    from daq.export import write_samples_csv
    from daq.rig import parse_rig
    from analysis.trace_io import read_trace_csv
    log = RunLog.create(tmp_path / "aux.db", parse_rig("[sweep]\nstart = 0\nstop = 3\nstep = 1\n"))
    log.append_samples([0.0, 0.1], [0, 1], [1, 1], [0, 0], [1.0, 2.0])
    log.append_samples([0.2, 0.3], [2, 3], [1, 1], [0, 0], [3.0, 0.1], aux={"temp C": [24.5, 24.75],
                                                                            "position": [7.0, 8.0]})
    write_samples_csv(log, tmp_path / "samples.csv")
    log.close()
    rows = _rows(tmp_path / "samples.csv")
    assert list(rows[0])[6:] == ["aux_position", "temp_C"]      # a clash gets a prefix
    assert [r["temp_C"] for r in rows] == ["", "", "24.5", "24.75"]
    assert [r["aux_position"] for r in rows] == ["", "", "7.0", "8.0"]
    # The analysis's own CSV reader takes the file, missing aux values as NaN.
    back = read_trace_csv(tmp_path / "samples.csv")
    assert back["position"].tolist() == [0, 1, 2, 3] and back["intensity"].tolist() == [1.0, 2.0, 3.0, 0.1]
    assert np.isnan(back["temp_c"][0]) and back["temp_c"][3] == 24.75
