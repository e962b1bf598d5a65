"""A camera looking at the beam spot (on a card or straight on the sensor).

Each reading is one frame reduced to a number: the background-subtracted sum
over the region of interest (common practice for spot intensity), with the
spot's intensity-weighted centroid in ``Reading.aux`` (``centroid_x_px``,
``centroid_y_px``) and, when any ROI pixel is at full scale, ``saturated`` = 1
and ``saturated_px`` = their number. ``camera`` captures through OpenCV from a device index, a
device path or a video file; ``sim-camera`` takes frames from the simulated
bench; both go through the same ``FrameReducer``.

Capture backends queue frames, so a frame grabbed right after a move may
show the grating where it was before. Before every reading ``stale_frames``
queued frames are discarded and the next one is used.

Laser safety: never look at the beam or its reflections to align a camera;
use the camera's image, an IR viewer, and eyewear rated for the wavelength.
"""
from __future__ import annotations

import logging
import os
from typing import Any

import numpy as np

from drivers.base import DeviceError, Reading

log = logging.getLogger("modetick.drivers.camera")

REDUCER_KEYS: dict[str, Any] = {
    "roi": (list, ...),              # [x, y, w, h] in pixels; [0, 0, 0, 0] = the whole frame
    "channel": "gray",               # "gray", "red", "green", "blue" or "max" (brightest channel)
    "background": "none",            # "none", "constant" or "dark-frame"
    "background_level": 0.0,         # per-pixel level subtracted for "constant"
    "dark_frame": (str, None),       # image (PNG/TIFF), .npy or video (frames averaged) for "dark-frame"
    "saturation_level": (float, None),  # raw pixel value counted as saturated; default the dtype's maximum
}

CAMERA_KEYS: dict[str, Any] = {
    **REDUCER_KEYS,
    "source": (str, ...),            # "0" (device index), "/dev/video2", or a video file path
    "exposure": (float, None),       # backend units (V4L2: 100 us); None leaves the camera's setting
    "stale_frames": (int, None),     # queued frames dropped before each reading; default 0 for
                                     # a file, 4 for a live camera
    "retries": 2,                    # a live camera may drop a frame now and then
}

_CHANNELS = {"blue": 0, "green": 1, "red": 2}   # OpenCV orders colour planes B, G, R


def check_reducer_settings(cfg: dict) -> list[tuple[str, str]]:
    out = []
    roi = cfg["roi"]
    if len(roi) != 4 or not all(isinstance(v, int) and not isinstance(v, bool) for v in roi) \
            or min(roi) < 0:
        out.append(("roi", f"must be [x, y, w, h] in whole pixels, not negative, got {roi!r}"))
    if cfg["channel"] not in ("gray", "max", *_CHANNELS):
        out.append(("channel", f"must be gray, red, green, blue or max, got {cfg['channel']!r}"))
    if cfg["background"] not in ("none", "constant", "dark-frame"):
        out.append(("background", f"must be none, constant or dark-frame, got {cfg['background']!r}"))
    if cfg["background"] == "dark-frame" and not cfg["dark_frame"]:
        out.append(("dark_frame", "is required when background = \"dark-frame\""))
    return out


def _intensity(frame: np.ndarray, channel: str) -> np.ndarray:
    """One float plane from a gray or BGR frame (gray: ITU-R BT.601 luma weights)."""
    if frame.ndim == 2:
        return frame.astype(np.float64)
    if frame.shape[2] == 1:
        return frame[:, :, 0].astype(np.float64)
    bgr = frame[:, :, :3].astype(np.float64)
    if channel == "gray":
        return bgr @ np.array([0.114, 0.587, 0.299])
    if channel == "max":
        return bgr.max(axis=2)
    return bgr[:, :, _CHANNELS[channel]]


def load_dark_frame(path: str, channel: str) -> np.ndarray:
    """A dark frame as a float plane: an image, a .npy array or a video (mean of its frames)."""
    import cv2

    if not os.path.isfile(path):
        raise DeviceError(f"camera dark_frame {path}: no such file")
    if path.endswith(".npy"):
        return _intensity(np.load(path), channel)
    img = cv2.imread(path, cv2.IMREAD_UNCHANGED)
    if img is not None:
        return _intensity(img, channel)
    cap = cv2.VideoCapture(path)
    planes = []
    while len(planes) < 200:
        ok, frame = cap.read()
        if not ok:
            break
        planes.append(_intensity(frame, channel))
    cap.release()
    if not planes:
        raise DeviceError(f"camera dark_frame {path}: not a readable image or video")
    return np.mean(planes, axis=0)


class FrameReducer:
    """Frame -> Reading: ROI sum after background subtraction, centroid, saturation."""

    def __init__(self, cfg: dict, where: str):
        problems = check_reducer_settings(cfg)
        if problems:
            key, msg = problems[0]
            raise DeviceError(f"[detector] {key}: {msg}")
        self.cfg, self.where = cfg, where
        self.dark = load_dark_frame(cfg["dark_frame"], cfg["channel"]) \
            if cfg["background"] == "dark-frame" else None
        self._warned_saturation = False
        self.saturated_readings = 0

    def check_frame_size(self, width: int, height: int) -> None:
        x, y, w, h = self.cfg["roi"]
        if w and h and (x + w > width or y + h > height):
            raise DeviceError(f"{self.where}: roi {self.cfg['roi']} does not fit the {width}x{height} frame")
        if self.dark is not None and self.dark.shape != (height, width):
            raise DeviceError(f"{self.where}: dark frame is {self.dark.shape[1]}x{self.dark.shape[0]}, "
                              f"camera frames are {width}x{height}")

    def reduce(self, frame: np.ndarray) -> Reading:
        height, width = frame.shape[:2]
        x, y, w, h = self.cfg["roi"]
        if not (w and h):
            x, y, w, h = 0, 0, width, height
        self.check_frame_size(width, height)
        raw = frame[y:y + h, x:x + w]
        img = _intensity(raw, self.cfg["channel"])
        if self.cfg["background"] == "constant":
            img = img - self.cfg["background_level"]
        elif self.dark is not None:
            img = img - self.dark[y:y + h, x:x + w]
        value = float(img.sum())    # negative pixels kept: clipping would bias the dark level up
        weights = np.clip(img, 0.0, None)
        total = float(weights.sum())
        if total > 0:
            cx = x + float((weights.sum(axis=0) * np.arange(w)).sum()) / total
            cy = y + float((weights.sum(axis=1) * np.arange(h)).sum()) / total
        else:
            cx = cy = float("nan")
        level = self.cfg["saturation_level"]
        if level is None:
            level = float(np.iinfo(frame.dtype).max) if np.issubdtype(frame.dtype, np.integer) else 1.0
        saturated = int(np.count_nonzero((raw.max(axis=2) if raw.ndim == 3 else raw) >= level))
        if saturated:
            self.saturated_readings += 1
            if not self._warned_saturation:
                self._warned_saturation = True
                log.warning("%s: %d pixel(s) of the region of interest are saturated; readings are "
                            "clipped (lower the exposure or add an attenuator)", self.where, saturated)
        aux = {"centroid_x_px": cx, "centroid_y_px": cy}
        if saturated:   # same keys as the simulated detector: "saturated" = 1 when clipped
            aux["saturated"], aux["saturated_px"] = 1.0, float(saturated)
        return Reading(value, 0.0, aux)


def _quiet_opencv() -> None:
    """OpenCV prints its own warnings on stderr; ours say the same in one line."""
    import cv2

    try:
        cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_ERROR)
    except AttributeError:
        pass


class CameraDetector:
    """OpenCV capture: a device index, a device path or a video file."""

    def __init__(self, cfg: dict):
        import cv2

        _quiet_opencv()
        self.cfg = cfg
        src = cfg["source"]
        self.where = f"camera {src}"
        self.name = f"camera {src}"
        self.reducer = FrameReducer(cfg, self.where)
        self.is_file = not src.isdigit() and os.path.isfile(src)
        if not src.isdigit() and not os.path.exists(src):
            raise DeviceError(f"{self.where}: no such device or video file")
        self.cap = cv2.VideoCapture(int(src) if src.isdigit() else src)
        if not self.cap.isOpened():
            raise DeviceError(f"{self.where}: cannot open it (not a camera or not a readable video)")
        self.stale = cfg["stale_frames"] if cfg["stale_frames"] is not None else (0 if self.is_file else 4)
        self.frames_read = 0
        self.exposure_note = ""
        if not self.is_file:
            self.cap.set(cv2.CAP_PROP_BUFFERSIZE, 1)   # fewer queued frames where the backend allows
        if cfg["exposure"] is not None:
            self._set_exposure(cfg["exposure"])
        width = int(self.cap.get(cv2.CAP_PROP_FRAME_WIDTH))
        height = int(self.cap.get(cv2.CAP_PROP_FRAME_HEIGHT))
        if width and height:
            self.reducer.check_frame_size(width, height)
        self.size = (width, height)

    def _set_exposure(self, value: float) -> None:
        import cv2

        # V4L2 takes 1 for manual exposure, some backends 0.25; try both.
        for manual in (1, 0.25):
            self.cap.set(cv2.CAP_PROP_AUTO_EXPOSURE, manual)
            if self.cap.set(cv2.CAP_PROP_EXPOSURE, value) and abs(self.cap.get(cv2.CAP_PROP_EXPOSURE) - value) < 1e-6 * max(1, abs(value)):
                self.exposure_note = f", exposure {value:g}"
                return
        self.exposure_note = ", exposure not settable (camera keeps its own)"
        log.warning("%s does not accept exposure %g; it keeps its own exposure", self.where, value)

    def identify(self) -> str:
        kind = "video file" if self.is_file else f"camera via {self.cap.getBackendName()}"
        return f"{kind} {self.cfg['source']}, {self.size[0]}x{self.size[1]}{self.exposure_note}"

    def _frame(self) -> np.ndarray:
        for _ in range(self.stale):
            self.cap.grab()
        ok, frame = self.cap.read()
        if ok and frame is not None:
            self.frames_read += 1
            return frame
        if self.is_file:
            raise DeviceError(f"{self.where}: video ended after {self.frames_read} frames")
        return None

    def read(self) -> Reading:
        for _ in range(self.cfg["retries"] + 1):
            frame = self._frame()
            if frame is not None:
                return self.reducer.reduce(frame)
        raise DeviceError(f"{self.where}: no frame after {self.cfg['retries'] + 1} tries (camera unplugged?)")

    def close(self) -> None:
        self.cap.release()


class SimCameraDetector:
    """Frames rendered by the simulated bench, reduced exactly as a real camera's."""

    def __init__(self, cfg: dict, bench: Any):
        self.bench = bench
        self.where = "sim-camera"
        self.name = "sim-camera"
        self.reducer = FrameReducer(cfg, self.where)

    def identify(self) -> str:
        return "simulated camera (frames rendered by the simulated bench)"

    def read(self) -> Reading:
        return self.reducer.reduce(self.bench.capture_frame())

    def close(self) -> None:
        pass
