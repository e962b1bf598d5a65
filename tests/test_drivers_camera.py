"""camera and sim-camera detectors: real OpenCV on real video files written by cv2.VideoWriter.

Frames are drawn here with known spots; the expected readings are computed
here from those frames with numpy (ROI sum minus background), independent of
the driver. FFV1 is lossless, so the decoded pixels are the drawn ones.
"""
from __future__ import annotations

import logging

import cv2
import numpy as np
import pytest

from drivers.base import DeviceError
from drivers.registry import DETECTOR_DRIVERS, open_devices
from tests.test_drivers_support import sections

W, H = 64, 48
SPOTS = [((20, 18), 40), ((30, 24), 90), ((41, 30), 150), ((33, 22), 60), ((25, 25), 120), ((44, 20), 30)]

from daq.rig import RigError  # noqa: E402

# A bad setting is refused by the rig loader (RigError) or, for what only the
# device can tell (a file that is not there, a frame size), when it opens.
BAD_SETTING = (RigError, DeviceError)


def draw(centre, level, background=10):
    gray = np.full((H, W), background, np.uint8)
    cv2.circle(gray, centre, 5, int(background + level), thickness=-1)
    return gray


def write_video(path, grays) -> None:
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"FFV1"), 25, (W, H), isColor=True)
    assert writer.isOpened()
    for g in grays:
        writer.write(cv2.cvtColor(g, cv2.COLOR_GRAY2BGR))
    writer.release()


def open_camera(**keys):
    base = dict(driver="camera", roi=[8, 6, 48, 36])
    base.update(keys)
    return DETECTOR_DRIVERS["camera"].factory(sections({"driver": "sim"}, base), None)


@pytest.fixture
def video(tmp_path):
    frames = [draw(c, lvl) for c, lvl in SPOTS]
    path = tmp_path / "spots.avi"
    write_video(path, frames)
    return path, frames


def test_roi_sum_minus_background_and_centroid(video):
    path, frames = video
    cam = open_camera(source=str(path), background="constant", background_level=10.0)
    assert "64x48" in cam.identify()
    for (centre, level), frame in zip(SPOTS, frames):
        r = cam.read()
        expected = float((frame[6:42, 8:56].astype(float) - 10.0).sum())
        assert r.value == pytest.approx(expected, abs=1e-6)
        # a filled disc is symmetric about its centre, so that is its centroid
        assert (r.aux["centroid_x_px"], r.aux["centroid_y_px"]) == pytest.approx(centre, abs=1e-9)
        assert "saturated" not in r.aux
    with pytest.raises(DeviceError) as exc:
        cam.read()
    assert "video ended after 6 frames" in str(exc.value)
    cam.close()


def test_dark_frame_subtraction(tmp_path):
    yy, xx = np.mgrid[0:H, 0:W]
    dark = (5 + xx // 4 + yy // 6).astype(np.uint8)      # an uneven dark level
    cv2.imwrite(str(tmp_path / "dark.png"), dark)
    spot = draw((32, 24), 100, background=0)
    write_video(tmp_path / "lit.avi", [dark + spot, dark])
    cam = open_camera(source=str(tmp_path / "lit.avi"), background="dark-frame",
                      dark_frame=str(tmp_path / "dark.png"), roi=[0, 0, 0, 0])
    lit, unlit = cam.read(), cam.read()
    assert lit.value == pytest.approx(float(spot.sum()), abs=1e-6)
    assert unlit.value == pytest.approx(0.0, abs=1e-9)
    cam.close()


def test_stale_frames_are_skipped(video):
    path, frames = video
    cam = open_camera(source=str(path), stale_frames=1)
    got = [cam.read().value for _ in range(3)]
    expected = [float(frames[i][6:42, 8:56].astype(float).sum()) for i in (1, 3, 5)]
    assert got == pytest.approx(expected)
    cam.close()


def test_colour_channel_choice(tmp_path):
    bgr = np.zeros((H, W, 3), np.uint8)
    bgr[10:20, 10:20, 2] = 200                       # a red spot
    bgr[30:40, 30:40, 0] = 100                       # a blue one
    writer = cv2.VideoWriter(str(tmp_path / "c.avi"), cv2.VideoWriter_fourcc(*"FFV1"), 25, (W, H))
    writer.write(bgr)
    writer.release()
    cam = open_camera(source=str(tmp_path / "c.avi"), roi=[0, 0, 0, 0], channel="red")
    assert cam.read().value == pytest.approx(200.0 * 100)
    cam.close()


def test_saturation_is_flagged_and_warned(tmp_path, caplog):
    frame = draw((32, 24), 245)                      # 10 + 245 = 255: the disc is clipped
    write_video(tmp_path / "sat.avi", [frame])
    cam = open_camera(source=str(tmp_path / "sat.avi"))
    with caplog.at_level(logging.WARNING, logger="modetick.drivers.camera"):
        r = cam.read()
    assert r.aux["saturated"] == 1.0
    assert r.aux["saturated_px"] == float((frame[6:42, 8:56] == 255).sum()) > 0
    assert "saturated" in caplog.text
    cam.close()


def test_open_errors(video, tmp_path):
    path, _ = video
    with pytest.raises(BAD_SETTING) as exc:
        open_camera(source=str(tmp_path / "missing.avi"))
    assert "missing.avi: no such device or video file" in str(exc.value)
    with pytest.raises(BAD_SETTING) as exc:
        open_camera(source=str(path), roi=[40, 30, 40, 30])
    assert "does not fit the 64x48 frame" in str(exc.value)
    with pytest.raises(BAD_SETTING) as exc:
        open_camera(source=str(path), roi=[1, 2, 3])
    assert "[detector] roi" in str(exc.value)
    cam = open_camera(source=str(path), exposure=20.0)  # a file has no exposure: noted, not fatal
    assert "exposure not settable" in cam.identify()
    cam.close()


def test_sim_camera_peaks_sit_on_the_simulated_modes():
    from scipy.signal import find_peaks

    from daq.rig import load_rig

    rig = load_rig(None, ["detector.driver=sim-camera", "detector.roi=[0, 0, 0, 0]",
                          "detector.background=constant", "detector.background_level=12.0",
                          "sim.scenario=camera", "sweep.start=1000", "sweep.stop=1400"])
    stage, det, bench = open_devices(rig.sections)
    values = []
    for steps in range(1000, 1401):
        stage.move_to(steps)
        values.append(det.read().value)
    stage.close()
    det.close()
    values = np.array(values)
    # Reference peak finder: scipy.signal.find_peaks; a blip must stand well above the spread.
    peaks, _ = find_peaks(values, prominence=0.5 * (values.max() - np.median(values)))
    found = 1000 + peaks
    centres = [c for c in bench.truth()["mode_centres_steps"] if 1005 <= c <= 1395]
    assert len(found) == len(centres) >= 7
    assert np.abs(found - np.array(centres)).max() <= 2.0


def test_sim_camera_frames_advance_the_simulated_clock():
    # Each frame is a reading: the simulated clock (and with it 1/f noise and drift) moves on.
    from daq.rig import load_rig
    from drivers.registry import open_devices
    from pathlib import Path
    rig = load_rig(Path(__file__).resolve().parent.parent / "configs" / "sim-camera.toml", ["sweep.settle_s=0.01"])
    stage, det, bench = open_devices(rig.sections)
    t0 = bench.time_s()
    det.read()
    det.read()
    assert bench.time_s() == pytest.approx(t0 + 2 * bench.dt_s)
