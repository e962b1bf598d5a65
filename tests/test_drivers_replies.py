"""Property tests of the reply handling: line splitting over pyserial's loop:// URL, number parsing.

loop:// is pyserial's own loop-back port: what is written comes back, so the
real LineLink reads real bytes through pyserial without any emulator.
"""
from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.base import TransientDeviceError
from drivers.replies import parse_steps, parse_value
from drivers.serial_link import LineLink
from tests.test_drivers_support import REPLY_S

printable_line = st.text(st.characters(min_codepoint=0x21, max_codepoint=0x7E), min_size=1, max_size=20)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(printable_line, st.sampled_from(["\r", "\n", "\r\n"])), min_size=1, max_size=8))
def test_any_crlf_ending_splits_lines_the_same(lines):
    # Lines that are there get a long timeout (a stalled machine must not miss them);
    # the read that must find nothing gets a short one, as each example pays it.
    link = LineLink("loop://", baudrate=1_000_000, eol="\r", timeout_s=REPLY_S, label="stage")
    try:
        link._ser.write("".join(text + end for text, end in lines).encode("ascii"))
        assert [link.read_line("X") for _ in lines] == [text for text, _ in lines]
        with pytest.raises(TransientDeviceError, match="no reply"):
            link.read_line("X", timeout_s=0.01)
    finally:
        link.close()


def test_exact_terminator_and_partial_reply():
    link = LineLink("loop://", baudrate=1_000_000, eol=";", timeout_s=REPLY_S, label="stage")
    link._ser.write(b"A1;B\r2;C3")
    assert link.read_line("Q") == "A1"
    with pytest.raises(TransientDeviceError, match="garbled"):
        link.read_line("Q")                         # a CR inside a line is not printable text
    with pytest.raises(TransientDeviceError) as exc:
        link.read_line("Q", timeout_s=0.05)         # the partial line is already in: it waits the timeout out
    assert "got 'C3' without the line terminator ';'" in str(exc.value)
    link.close()


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=12))
def test_parse_value_accepts_finite_numbers_only(text):
    try:
        value = parse_value(text, "meter", "READ?", text)
    except TransientDeviceError as exc:
        assert "READ?" in str(exc)
        return
    assert math.isfinite(value) and value == float(text)


@settings(max_examples=200, deadline=None)
@given(st.one_of(st.integers(-10**9, 10**9).map(str), st.text(max_size=8),
                 st.floats(allow_nan=True, allow_infinity=True).map(repr)))
def test_parse_steps_whole_numbers_only(text):
    try:
        steps = parse_steps(text)
    except ValueError:
        return
    assert isinstance(steps, int) and steps == float(text)


def test_a_waiting_reply_is_read_even_after_the_deadline():
    # A thread held up past its deadline (a loaded machine) must still take a reply
    # that is already in the port's buffer: a zero timeout still reads once.
    link = LineLink("loop://", baudrate=1_000_000, eol="\r", timeout_s=REPLY_S, label="stage")
    try:
        link._ser.write(b"POS 42\r")
        assert link.read_line("POS?", timeout_s=0.0) == "POS 42"
    finally:
        link.close()
