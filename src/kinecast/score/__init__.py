"""Scoring: per-frame metrics, simple baseline forecasts, object tracks and oscillation periods.

Scores compare statistical extrapolations with held-out frames; they describe how well a forecast
matched this recording, not a guarantee about the next one.
"""

from .baselines import constant_velocity, farneback_flow, flow_warp, persistence
from .metrics import band_coverage, frame_metrics, mae, mse, psnr, ssim, valid_horizon
from .tracks import (centroid_track, dominant_period, foreground, median_background,
                     track_period)

__all__ = [
    "band_coverage", "centroid_track", "constant_velocity", "dominant_period", "farneback_flow",
    "flow_warp", "foreground", "frame_metrics", "mae", "median_background", "mse", "persistence",
    "psnr", "ssim", "track_period", "valid_horizon",
]
