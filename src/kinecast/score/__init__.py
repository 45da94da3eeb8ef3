"""Scoring: per-frame metrics, simple baseline forecasts; object tracks and oscillation periods
(from :mod:`kinecast.frames.tracks`, where they live) are re-exported here.

Scores compare statistical extrapolations with held-out frames; they describe how well a forecast
matched this recording, not a guarantee about the next one. ``kinecast.score.verdict`` turns the
scores into a plain-words verdict on whether a model beats the baselines.
"""

from .baselines import background_only, constant_velocity, farneback_flow, flow_warp, persistence
from .metrics import (band_coverage, frame_metrics, leading_run, mae, mse, object_horizon, object_region,
                      position_coverage, psnr, ssim, valid_horizon)
from ..frames.tracks import (centroid_track, dominant_period, find_objects, foreground, match_objects,
                             median_background, object_errors, track_period)

__all__ = [
    "background_only", "band_coverage", "centroid_track", "constant_velocity", "dominant_period",
    "farneback_flow", "find_objects", "flow_warp", "foreground", "frame_metrics", "leading_run", "mae",
    "match_objects", "median_background", "mse", "object_errors", "object_horizon", "object_region",
    "persistence", "position_coverage", "psnr", "ssim", "track_period", "valid_horizon",
]
