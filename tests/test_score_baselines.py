"""Baseline forecasts against closed-form motion: uniform translation of a pattern or a disc."""

import numpy as np
import pytest

from kinecast.errors import KinecastError
from kinecast.score import (centroid_track, constant_velocity, farneback_flow, flow_warp, mae,
                            persistence)
from test_score_tracks import render_disc

SIZE = 64
MARGIN = 12  # pixels left out at the border, where replicated pixels stand in for unseen ones


def smooth_pattern(dx, dy, channels=1):
    """A smooth periodic pattern translated by (dx, dy) px, in closed form: (C, H, W) in [0.15, 0.85]."""
    yy, xx = np.mgrid[0:SIZE, 0:SIZE].astype(np.float64)
    x, y = xx - dx, yy - dy
    base = (0.5 + 0.2 * np.sin(2 * np.pi * x / 23 + 0.3) * np.cos(2 * np.pi * y / 29)
            + 0.15 * np.sin(2 * np.pi * (x + y) / 17))
    return np.stack([base * (0.8 + 0.1 * c) + 0.05 * c for c in range(channels)]).astype(np.float32)


def translating(times, velocity, channels=1):
    """Frames (T, C, H, W) of the pattern moving uniformly: displacement = velocity x time."""
    return np.stack([smooth_pattern(*(np.asarray(velocity) * t), channels) for t in times])


def interior(frames):
    return frames[..., MARGIN:-MARGIN, MARGIN:-MARGIN]


def test_persistence_repeats_the_last_frame():
    # Definition of the persistence forecast.
    context = np.random.default_rng(0).random((3, 2, 8, 9)).astype(np.float32)
    out = persistence(context, 4)
    assert out.shape == (4, 2, 8, 9)
    assert np.array_equal(out, np.repeat(context[-1:], 4, axis=0))


def test_farneback_flow_recovers_a_translation():
    # Uniform translation (closed form) by (1.3, -0.7) px: the dense flow in the interior equals it.
    # 0.1 px is our acceptance level for Farnebäck on an 8-bit 64 px frame.
    d = np.array([1.3, -0.7])
    flow = farneback_flow(smooth_pattern(0, 0), smooth_pattern(*d))
    assert flow.shape == (2, SIZE, SIZE)
    assert np.abs(np.median(interior(flow), axis=(1, 2)) - d).max() < 0.1


@pytest.mark.parametrize("channels", [1, 3])
def test_flow_warp_follows_a_uniform_translation(channels):
    # Closed-form truth: after N steps the pattern is shifted by N d. The warped frames must stay
    # within 0.02 (2% of the range; our acceptance level) mean absolute error in the interior and
    # beat persistence by 10x.
    times = np.arange(11.0)
    frames = translating(times, (1.3, -0.7), channels)
    pred = flow_warp(frames[:3], 8)
    truth = frames[3:]
    assert pred.shape == truth.shape
    err = mae(interior(pred), interior(truth))
    err_still = mae(interior(persistence(frames[:3], 8)), interior(truth))
    assert err.max() < 0.02
    assert np.all(err < 0.1 * err_still)


def test_flow_warp_scales_irregular_intervals():
    # Same closed form on irregular times: displacement = velocity x elapsed time, so a step half
    # as long moves half as far. Ignoring the times puts every frame at the wrong place.
    times = np.array([0.0, 1.0, 2.0, 2.5, 3.0, 4.5, 5.0])
    frames = translating(times, (1.0, 0.8))
    pred = flow_warp(frames[:3], 4, times)
    err = mae(interior(pred), interior(frames[3:]))
    wrong = mae(interior(flow_warp(frames[:3], 4)), interior(frames[3:]))
    assert err.max() < 0.02
    assert np.all(err < 0.5 * wrong)


def test_constant_velocity_moves_a_disc_at_its_velocity():
    # Constant-velocity kinematics x = x0 + v t (closed form). Each rendered centroid is accurate to
    # eps = 0.02 px (supersampled disc, see test_score_tracks), so the measured velocity is within
    # 2 eps and the predicted position after j + 1 steps within eps + 2 eps (j + 1).
    eps = 0.02
    p0, v = np.array([15.2, 40.7]), np.array([2.3, -1.1])
    times = np.arange(10.0)
    frames = render_disc(p0 + times[:, None] * v)
    bg = np.full((1, SIZE, SIZE), 0.2, np.float32)
    pred = constant_velocity(frames[:3], 7, background=bg)
    track = centroid_track(pred, bg)
    steps = np.arange(1, 8)[:, None]
    assert np.all(np.abs(track - (p0 + times[3:, None] * v)) <= eps + 2 * eps * steps)
    # far from the disc's old and new places the frame is the last context frame unchanged
    assert np.array_equal(pred[:, :, :, 50:], np.repeat(frames[2:3, :, :, 50:], 7, axis=0))
    assert np.all(mae(pred, frames[3:]) < 0.2 * mae(persistence(frames[:3], 7), frames[3:]))


def test_constant_velocity_on_textured_background_and_irregular_times():
    # x = x0 + v t on irregular times over a textured static background. Over texture the
    # intensity-weighted centroid is off the geometric centre by a bias b (measured here on the
    # rendered frames against the closed form); the measured velocity is then within
    # 2 b / (last context interval), and the forecast within b + 2 b (elapsed / last interval).
    yy, xx = np.mgrid[0:SIZE, 0:SIZE]
    bg = (0.25 + 0.1 * np.sin(xx / 7.0) * np.cos(yy / 5.0)).astype(np.float32)[None]
    p0, v = np.array([6.0, 30.0]), np.array([10.0, 2.0])  # px, px per second
    times = np.array([0.0, 0.5, 1.0, 1.25, 2.0, 2.5, 3.0, 3.2, 4.0, 4.8])
    exact = p0 + times[:, None] * v
    frames = render_disc(exact, radius=3.0, background=bg[0])
    bias = np.abs(centroid_track(frames, bg) - exact).max()
    bound = bias + 2 * bias * (times[5:] - times[4]) / (times[4] - times[3])
    # the caller's background, and the median of the context (the disc is on each pixel in at
    # most 2 of the 5 context frames, so the median is the background there)
    for background in (bg, None):
        pred = constant_velocity(frames[:5], 5, times, background=background)
        err = np.abs(centroid_track(pred, bg) - exact[5:]).max(axis=1)
        assert np.all(err <= bound)
    still = np.abs(centroid_track(persistence(frames[:5], 5), bg) - exact[5:]).max(axis=1)
    assert np.all(still > bound)


def test_constant_velocity_without_object_is_persistence():
    # No foreground in the context: nothing to move (documented fallback).
    context = np.full((3, 1, 16, 16), 0.3, np.float32)
    assert np.array_equal(constant_velocity(context, 2), persistence(context, 2))


def test_baselines_reject_bad_input():
    frames = np.zeros((3, 1, 16, 16), np.float32)
    for bad in (lambda: persistence(frames[:1], 2), lambda: flow_warp(frames, 0),
                lambda: flow_warp(frames, 2, times=np.arange(4.0)),
                lambda: constant_velocity(frames, 2, times=np.array([0, 1, 1, 2, 3.0]))):
        with pytest.raises(KinecastError):
            bad()
