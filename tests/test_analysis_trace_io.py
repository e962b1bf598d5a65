"""CSV traces: a header naming at least position and intensity; one-line errors otherwise."""
from __future__ import annotations

import numpy as np
import pytest

from analysis.pipeline import analyze_trace
from analysis.trace_io import read_trace_csv
from tests.tracegen import Spec, make_trace


def write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


def test_reads_columns_in_any_order_with_extras(tmp_path):
    p = write(tmp_path / "t.csv", "time_s, Intensity ,position\n0.0,1.5,100\n0.1,1.7,101\n0.2,1.6,102\n")
    t = read_trace_csv(p)
    assert t["position"].tolist() == [100.0, 101.0, 102.0]
    assert t["intensity"].tolist() == [1.5, 1.7, 1.6]
    assert t["time_s"].tolist() == [0.0, 0.1, 0.2]


@pytest.mark.parametrize("text, words", [
    ("", "empty"),
    ("time_s,intensity\n0,1\n", "position"),
    ("position,value\n1,2\n", "intensity"),
    ("position,intensity\n1,2\n2,oops\n", "line 3"),
    ("position,intensity\n1,2\n2\n", "line 3"),
    ("position,intensity\n", "no data"),
    ("position,intensity\n1,inf\n", "finite"),
])
def test_unusable_files_give_one_line_errors(tmp_path, text, words):
    p = write(tmp_path / "bad.csv", text)
    with pytest.raises(ValueError) as err:
        read_trace_csv(p)
    msg = str(err.value)
    assert words in msg and "\n" not in msg and str(p) in msg


def test_missing_file_is_a_value_error(tmp_path):
    with pytest.raises(ValueError, match="cannot read"):
        read_trace_csv(tmp_path / "nope.csv")


def test_a_trace_written_as_csv_analyses_like_the_arrays(tmp_path):
    tr = make_trace(Spec(seed=41, n_modes=30, spacing_steps=40, snr=30, passes=2, backlash_steps=20))
    lines = ["position,intensity,time_s"] + [f"{p:.0f},{float(v)!r},{i * 0.01:.2f}"
                                            for i, (p, v) in enumerate(zip(tr.position, tr.value))]
    t = read_trace_csv(write(tmp_path / "sweep.csv", "\n".join(lines) + "\n"))
    a = analyze_trace(t["position"], t["intensity"], sections=tr.sections)
    b = analyze_trace(tr.position, tr.value, sections=tr.sections)
    assert (a["modes"], a["crossings"], a["spacing_steps"]) == (b["modes"], b["crossings"], b["spacing_steps"])
    assert np.isfinite(a["length_um"])
