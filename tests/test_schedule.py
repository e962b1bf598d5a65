"""Sweep schedules: passes alternate, overshoot takes up backlash, resume skips exactly."""
from daq.schedule import moves, pass_points, recorded_count


def sweep(**kw):
    base = dict(start=0, stop=10, step=5, passes=1, overshoot_steps=0)
    base.update(kw)
    return base


def test_one_way():
    m = list(moves(sweep()))
    assert [x.target_steps for x in m] == [0, 5, 10]
    assert all(x.direction == 1 and x.record for x in m)


def test_there_and_back_does_not_read_the_turning_point_twice():
    m = list(moves(sweep(passes=2)))
    assert [x.target_steps for x in m] == [0, 5, 10, 5, 0]
    assert [x.direction for x in m] == [1, 1, 1, -1, -1]
    assert [x.pass_index for x in m] == [0, 0, 0, 1, 1]


def test_overshoot_moves_past_the_turn_without_reading():
    m = list(moves(sweep(passes=3, overshoot_steps=7)))
    assert [(x.target_steps, x.record) for x in m] == [
        (0, True), (5, True), (10, True), (17, False),
        (10, True), (5, True), (0, True), (-7, False),
        (0, True), (5, True), (10, True)]
    assert recorded_count(sweep(passes=3, overshoot_steps=7)) == 9


def test_downward_sweep():
    assert pass_points(sweep(start=10, stop=0, step=3)) == [10, 7, 4, 1]
    assert list(moves(sweep(start=10, stop=0, step=3)))[0].direction == -1


def test_resume_skips_exactly_the_recorded_moves():
    s = sweep(passes=3, overshoot_steps=7)
    full = [x for x in moves(s)]
    for k in range(recorded_count(s)):
        rest = list(moves(s, skip_recorded=k))
        assert sum(x.record for x in rest) == recorded_count(s) - k
        assert rest[-1] == full[-1]
