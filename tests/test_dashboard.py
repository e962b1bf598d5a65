"""The dashboard, rendered through rich's own recording console at 80x24."""
from rich.console import Console

from daq.dashboard import PlainView, _FONT, big_number, render, sparkline
from daq.engine import LiveState


def _state(**kw):
    st = LiveState(log_path="runs/x.db", total_samples=8000, passes=2, samples=2000,
                   position_steps=3000, direction=1, pass_index=0)
    st.estimate = {"modes": 47, "crossings": 47, "spacing_steps": 46.21, "spacing_steps_u": 0.12,
                   "backlash_steps": None}
    st.samples_done_this_run, st.t_run_s = 2000, 4.0
    for i in range(300):
        st.recent.append((1700 + i, 1.0 + (5.0 if i % 46 == 0 else 0.0)))
    st.recent_blips.extend([1700 + i for i in range(0, 300, 46)])
    for k, v in kw.items():
        setattr(st, k, v)
    return st


def _screen(st, width=80):
    con = Console(record=True, width=width, height=24, force_terminal=True, color_system=None)
    con.print(render(st, width))
    return con.export_text()


def test_count_is_drawn_large_and_fits_80_columns():
    text = _screen(_state())
    lines = text.splitlines()
    assert all(len(l) <= 80 for l in lines)
    assert len(lines) <= 24
    # The block font's rows for "47" appear on consecutive lines.
    want = big_number(47).plain.splitlines()
    joined = "\n".join(l for l in lines)
    for row in want:
        assert row in joined
    assert "46.21 ± 0.12 steps" in text
    assert "pass 1/2" in text and "↑ up" in text
    # 6000 samples left at 500 samples/s = 12 s.
    assert "left 0:00:12" in text
    assert "runs/x.db" in text


def test_blips_are_marked_under_the_trace():
    text = _screen(_state())
    marker_line = next(l for l in text.splitlines() if "▲" in l)
    assert marker_line.count("▲") >= 1


def test_calibrated_view_shows_nm_and_length():
    st = _state(calib=lambda sp, u, centre_steps=None, backlash_steps=None: {"spacing_nm": 0.1524, "spacing_nm_u": 0.0021,
                                     "wavelength_nm": 936.3, "length_um": 801.0, "length_um_u": 12.0})
    text = _screen(st)
    assert "0.1524 ± 0.0021 nm" in text and "936.30 nm" in text
    assert "801 ± 12 µm" in text


def test_warning_and_pause_are_shown():
    st = _state(paused=True)
    st.events.append(("warning", "detector saturated at 4095"))
    text = _screen(st)
    assert "detector saturated at 4095" in text and "PAUSED" in text


def test_font_covers_digits():
    assert set("0123456789") <= set(_FONT)
    assert all(len(rows) == 5 and all(len(r) == 3 for r in rows) for rows in _FONT.values())


def test_sparkline_extremes():
    top, bottom = sparkline([0.0, 1.0], 10).split("\n")
    assert bottom[0] == " " and bottom[1] == "█" and top[1] == "█" and top[0] == " "


def test_plain_line():
    line = PlainView(_state()).line()
    assert "modes 47" in line and "pass 1/2" in line and "2000/8000" in line


def test_a_count_not_started_yet_says_why():
    # Before the counter knows the noise level and the spacing, its 0 is not a count: the
    # dashboard and the plain progress line say what it is waiting for, from the counter itself.
    import numpy as np
    from analysis.counter import StreamCounter
    c = StreamCounter()
    rng = np.random.default_rng(1)
    c.feed(np.arange(1000), np.ones(1000, np.int8), 1.0 + 0.01 * rng.standard_normal(1000))
    est = c.estimate()
    assert est["modes"] == 0 and est["warming_up"] == "noise level, 1000/2048 samples"
    st = _state(estimate=est)
    screen = _screen(st)
    assert "warming up noise level, 1000/2048 samples" in " ".join(screen.split())
    assert "(warming up: noise level, 1000/2048 samples)" in PlainView(st).line()
    assert "warming up" not in _screen(_state())


def test_a_narrow_terminal_keeps_every_label_whole():
    # 60 columns (a split SSH window): the count drops the block digits, the labels stay whole
    text = _screen(_state(), width=60)
    assert all(len(l) <= 60 for l in text.splitlines())
    for label in ("modes counted", "spacing ", "position ", "progress ", "blips seen 47"):
        assert label in text
    assert "…" not in text.split("progress")[0]
