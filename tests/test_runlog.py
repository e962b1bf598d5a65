"""Run log round trip through real SQLite, and refusal of files that are not logs."""
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from daq.rig import load_rig, parse_rig
from daq.runlog import LogError, RunLog

ROOT = Path(__file__).resolve().parent.parent

RIG = "[sweep]\nstart = 0\nstop = 100\nstep = 1\n"


def test_round_trip_is_exact(tmp_path):
    rng = np.random.default_rng(3)
    rig = parse_rig(RIG, "bench.toml")
    log = RunLog.create(tmp_path / "run.db", rig)
    blocks = []
    for k in range(5):
        n = int(rng.integers(1, 300))
        b = dict(t_s=np.cumsum(rng.uniform(0.001, 0.01, n)) + k, position_steps=rng.integers(-5000, 5000, n),
                 direction=rng.choice([-1, 1], n), pass_index=rng.integers(0, 4, n),
                 value=rng.normal(0, 1, n) * 10 ** rng.uniform(-6, 3), spread=rng.uniform(0, 1, n))
        blocks.append(b)
        log.append_samples(b["t_s"], b["position_steps"], b["direction"], b["pass_index"], b["value"], b["spread"])
    log.append_events([(3, 0.1, "blip", 12.5, 1, 0, 2.0, 4.0, None)], commit=True)
    log.finish("finished", {"modes": 1})
    log.close()

    back = RunLog.open(tmp_path / "run.db")
    s = back.read_samples()
    for key in ("position_steps", "direction", "pass_index", "value", "spread"):
        want = np.concatenate([b[key] for b in blocks])
        assert np.array_equal(getattr(s, key), want), key
    want_t = np.concatenate([b["t_s"] for b in blocks])
    assert np.max(np.abs(s.t_s - want_t)) <= 0.5e-6  # stored in microseconds
    assert back.meta("status") == "finished"
    assert back.summary() == {"modes": 1}
    assert back.rig()["sweep"]["stop"] == 100
    assert back.events("blip")[0]["pos"] == 12.5
    assert back.n_samples == len(s)
    # The file is a valid SQLite database (SQLite's own check).
    con = sqlite3.connect(tmp_path / "run.db")
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_aux_channels_round_trip(tmp_path):
    log = RunLog.create(tmp_path / "aux.db", parse_rig(RIG))
    log.append_samples([0.0, 0.1], [0, 1], [1, 1], [0, 0], [1.0, 2.0], aux={"temp_C": [24.0, 24.5]})
    log.append_samples([0.2], [2], [1], [0], [3.0])
    s = log.read_samples()
    assert s.aux["temp_C"][:2].tolist() == [24.0, 24.5] and np.isnan(s.aux["temp_C"][2])


def test_refuses_to_overwrite(tmp_path):
    RunLog.create(tmp_path / "a.db", parse_rig(RIG)).close()
    with pytest.raises(LogError, match="already exists"):
        RunLog.create(tmp_path / "a.db", parse_rig(RIG))


@pytest.mark.parametrize("content, words", [
    (b"", "not a modetick run log"), (b"hello, not a database", "not a modetick run log"),
    (b"SQLite format 3\x00" + b"\x00" * 50, "damaged")])      # SQLite's header, then nothing sound
def test_not_a_log(tmp_path, content, words):
    p = tmp_path / "x.db"
    p.write_bytes(content)
    with pytest.raises(LogError, match=words):
        RunLog.open(p)


def test_other_sqlite_file_is_not_a_log(tmp_path):
    p = tmp_path / "other.db"
    con = sqlite3.connect(p)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    with pytest.raises(LogError, match="not a modetick run log"):
        RunLog.open(p)


def test_compact_storage(tmp_path):
    # Requirement from the performance issue: <= 12 bytes per sample.
    n = 200_000
    rng = np.random.default_rng(1)
    log = RunLog.create(tmp_path / "big.db", parse_rig(RIG))
    pos = np.arange(n)
    for a in range(0, n, 4096):
        sl = slice(a, a + 4096)
        log.append_samples(pos[sl] * 1e-3, pos[sl], np.ones(4096)[: len(pos[sl])], np.zeros(len(pos[sl])),
                           np.round(rng.normal(1.0, 0.01, len(pos[sl])), 6))
    log.close()
    size = sum(f.stat().st_size for f in tmp_path.glob("big.db*"))
    assert size / n <= 12


def _format1_block(log: RunLog, n: int, pos, value) -> None:
    """A sample block exactly as format 1 wrote it: each column one zlib stream
    (positions and times as int64 deltas, floats byte-shuffled), made here with
    zlib itself, not with the project's codecs."""
    import zlib

    def delta(a):
        return zlib.compress(np.diff(np.asarray(a, np.int64), prepend=0).astype("<i8").tobytes(), 1)

    def shuffled(a):
        return zlib.compress(np.asarray(a, "<f8").view(np.uint8).reshape(-1, 8).T.tobytes(), 1)

    log.conn.execute("INSERT INTO sample_blocks (block, first_i, n, t_us, pos, dir, pass, value, spread, "
                     "aux_json) VALUES (0, 0, ?, ?, ?, ?, ?, ?, ?, NULL)",
                     (n, delta(np.arange(n) * 1000), delta(pos), zlib.compress(np.ones(n, "<i1").tobytes()),
                      zlib.compress(np.zeros(n, "<i2").tobytes()), shuffled(value), shuffled(np.zeros(n))))
    log.conn.commit()


def test_format1_logs_still_read(tmp_path):
    rng = np.random.default_rng(8)
    n = 500
    pos, value = np.cumsum(rng.integers(-3, 4, n)) + 1000, rng.normal(0.5, 0.01, n)
    log = RunLog.create(tmp_path / "old.db", parse_rig(RIG))
    _format1_block(log, n, pos, value)
    log.close()
    s = RunLog.open(tmp_path / "old.db").read_samples()
    assert np.array_equal(s.position_steps, pos) and np.array_equal(s.value, value)
    assert s.t_s == pytest.approx(np.arange(n) * 1e-3, abs=1e-12)


@pytest.mark.parametrize("pos", [[], [7], [-2**40, 2**40, 0], list(range(0, 3000, 3)), [5] * 10])
def test_position_codec_edge_cases(tmp_path, pos):
    # any int64 sequence survives, whatever integer width its deltas need
    from daq.runlog import _pack_delta, _unpack_delta
    a = np.array(pos, np.int64)
    assert np.array_equal(_unpack_delta(_pack_delta(a)), a)


def test_float_codec_is_bit_exact_for_awkward_values():
    from daq.runlog import _pack_float, _unpack_float
    a = np.array([0.0, -0.0, np.inf, -np.inf, 5e-324, 1.7976931348623157e308, np.nan, 1 / 3])
    back = _unpack_float(_pack_float(a), a.size)
    assert back.tobytes() == a.tobytes()


def _create_unique(base: str) -> str:
    log = RunLog.create(Path(base), load_rig(None), unique=True)
    log.close()
    return str(log.path)


def test_default_names_never_collide_even_between_processes(tmp_path):
    # Eight processes create a log under the same default name at once: eight files.
    import multiprocessing
    base = str(tmp_path / "runs" / "20261202T000000Z.db")
    with multiprocessing.get_context("spawn").Pool(4) as pool:
        paths = pool.map(_create_unique, [base] * 8)
    assert len(set(paths)) == 8 and all(Path(p).exists() for p in paths)


def test_default_names_never_collide(tmp_path):
    # Two runs started in the same second under the default name: the second takes NAME-2.db.
    from daq.runlog import default_log_path
    rig = load_rig(None)
    base = default_log_path(tmp_path)
    a = RunLog.create(base, rig, unique=True)
    b = RunLog.create(base, rig, unique=True)
    assert a.path == base and b.path == base.with_name(base.stem + "-2.db")
    a.close()
    b.close()
    with pytest.raises(LogError, match="already exists"):      # a name the user gave is never changed
        RunLog.create(base, rig)


def test_a_log_that_cannot_be_made_is_bad_input_not_a_crash(tmp_path):
    (tmp_path / "afile").write_text("")
    with pytest.raises(LogError, match="cannot make its folder"):
        RunLog.create(tmp_path / "afile" / "x.db", load_rig(None))
    r = subprocess.run([sys.executable, "-m", "daq", "sweep", "--log", str(tmp_path / "afile" / "x.db")],
                       cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "cannot make its folder" in r.stderr and "Traceback" not in r.stderr


def test_end_of_run_summary_reads_with_units_and_rounded_uncertainties():
    # GUM 7.2.6 (common practice): an uncertainty to at most two significant digits, the
    # value to the same decimal place.
    from daq.summary import _pm, summary_rows
    assert _pm(801.402, 13.6833) == "801 ± 14"
    assert _pm(45.5727123, 0.000114779) == "45.57271 ± 0.00011"
    assert _pm(0.151036, 0.00150053) == "0.1510 ± 0.0015"
    rows = dict(summary_rows({"status": "stopped", "reason": "stopped by the q key", "modes": 40,
                              "crossings": 41, "spacing_steps": 45.6, "spacing_steps_u": 0.01,
                              "length_um": 801.4, "length_um_u": 13.7, "samples": 9, "log": "x.db",
                              "budget": [{"input": "[chip] group_index", "share": 0.654}]}))
    assert rows["status"] == "stopped by the q key"
    assert rows["modes counted"].startswith("40") and "41 blips" in rows["modes counted"]
    assert rows["chip length"] == "801 ± 14 µm   (65 % of it from [chip] group_index)"


def test_the_summary_says_what_its_figures_are():
    from daq.summary import summary_rows
    rows = dict(summary_rows({"status": "finished", "spacing_steps": 45.546, "spacing_steps_u": 0.026,
                              "spacing_steps_k95": 12.71, "length_um": 801.4, "length_um_u": 13.7,
                              "budget": [{"input": "[stage] angle_at_zero_deg", "share": 0.25}]}))
    # ± is the standard uncertainty; the 95 % interval is spelt out for that row (k u = 0.33)
    assert rows["mode spacing"] == "45.546 ± 0.026 steps   (95 %: ± 0.33 steps)"
    assert "(25 % of it from [stage] angle_at_zero_deg)" in rows["chip length"]
    assert rows["status"] == "finished"
    faulted = dict(summary_rows({"status": "faulted", "reason": "stage /dev/ttyUSB0: port closed"}))
    assert faulted["status"] == "faulted: stage /dev/ttyUSB0: port closed"


def test_figures_for_people_never_read_minus_zero():
    from daq.numbers import no_negative_zero, u_decimals
    assert f"{no_negative_zero(-0.00204):.1f}" == "0.0"       # a backlash of nothing
    assert f"{no_negative_zero(-0.06):.1f}" == "-0.1"         # a real one keeps its sign
    assert f"{no_negative_zero(-0.0004, 3):.3f}" == "0.000"
    assert [u_decimals(u) for u in (13.7, 0.0015, 0.26, 1.0)] == [0, 4, 2, 1]   # two significant digits
