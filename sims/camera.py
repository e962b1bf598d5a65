"""Camera renderer: a beam spot on an unevenly lit background, as uint8 frames.

The spot is a Gaussian with standard deviation ``spot_radius_px`` whose peak
follows the laser output (``spot_counts_per_v`` counts per volt the meter
would see). The zeroth-order output beam of a Littrow mount turns with the
grating, so the spot walks ``spot_shift_px_per_deg`` across the
frame. Pixels get Gaussian read noise, are rounded and saturate at 255.

The reduction a camera rig uses: background-subtracted sum over a disc (the
region of interest) at the frame centre, the background taken as the mean of
the frame's outer two-pixel border (common practice: sum over an ROI,
subtract the dark level, watch saturation).
"""
from __future__ import annotations

import numpy as np

ROI_RADII = 3.5  # ROI radius in spot radii
BORDER_PX = 2


class CameraModel:
    def __init__(self, width_px: int, height_px: int, spot_radius_px: float,
                 counts_per_v: float, background_counts: float, noise_counts: float,
                 shift_px_per_deg: float, angle_ref_deg: float):
        self.w, self.h = width_px, height_px
        self.r = spot_radius_px
        self.counts_per_v = counts_per_v
        self.noise = noise_counts
        self.shift = shift_px_per_deg
        self.angle_ref = angle_ref_deg
        self.xs = np.arange(width_px, dtype=np.float64)
        self.ys = np.arange(height_px, dtype=np.float64)
        # Uneven illumination: +-20 % left to right.
        self.background = background_counts * (0.8 + 0.4 * self.xs / (width_px - 1))[None, :] \
            * np.ones((height_px, 1))
        yy, xx = np.mgrid[0:height_px, 0:width_px]
        cx, cy = (width_px - 1) / 2.0, (height_px - 1) / 2.0
        self.roi = (xx - cx) ** 2 + (yy - cy) ** 2 <= (ROI_RADII * spot_radius_px) ** 2
        border = np.zeros((height_px, width_px), dtype=bool)
        border[:BORDER_PX, :] = border[-BORDER_PX:, :] = True
        border[:, :BORDER_PX] = border[:, -BORDER_PX:] = True
        self.border = border
        self.roi_pixels = int(self.roi.sum())
        self.border_pixels = int(border.sum())

    def spot_centre_px(self, angle_deg: float) -> tuple[float, float]:
        return ((self.w - 1) / 2.0 + self.shift * (angle_deg - self.angle_ref), (self.h - 1) / 2.0)

    def render(self, power_v: float, angle_deg: float, noise: np.ndarray | None) -> np.ndarray:
        """One uint8 frame; ``noise`` is a standard-normal (H, W) array or None (noise-free)."""
        cx, cy = self.spot_centre_px(angle_deg)
        inv = 1.0 / (2.0 * self.r * self.r)
        gx = np.exp(-((self.xs - cx) ** 2) * inv)
        gy = np.exp(-((self.ys - cy) ** 2) * inv)
        img = self.background + (self.counts_per_v * max(power_v, 0.0)) * np.outer(gy, gx)
        if noise is not None:
            img = img + self.noise * noise
        return np.clip(np.floor(img + 0.5), 0, 255).astype(np.uint8)

    def reduce(self, frame: np.ndarray) -> tuple[float, float, float]:
        """(background-subtracted ROI sum, centroid x, centroid y) of one frame."""
        f = frame.astype(np.float64)
        bg = float(f[self.border].mean())
        excess = np.where(self.roi, f - bg, 0.0)
        total = float(excess.sum())
        pos = np.clip(excess, 0.0, None)
        weight = float(pos.sum())
        if weight > 0:
            cx = float((pos.sum(axis=0) * self.xs).sum() / weight)
            cy = float((pos.sum(axis=1) * self.ys).sum() / weight)
        else:
            cx, cy = (self.w - 1) / 2.0, (self.h - 1) / 2.0
        return total, cx, cy

    def saturated(self, frame: np.ndarray) -> bool:
        """True when a pixel of the ROI sits at 255 (the sum no longer follows the light)."""
        return bool((frame[self.roi] == 255).any())

    def sum_noise_sigma(self) -> float:
        """Standard deviation of the ROI sum from pixel noise, rounding and the background estimate."""
        per_pixel_var = self.noise ** 2 + 1.0 / 12.0
        n, m = self.roi_pixels, self.border_pixels
        return float(np.sqrt(n * per_pixel_var * (1.0 + n / m)))

    def counts_per_v_in_sum(self) -> float:
        """ROI sum per volt of output (unsaturated): the Gaussian spot's integral 2 pi r^2."""
        return self.counts_per_v * 2.0 * np.pi * self.r * self.r
