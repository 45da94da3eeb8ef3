"""Rendering and the simulated camera: geometry against truth, camera effects against their
definitions and reference libraries."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from kinecast.errors import KinecastError
from kinecast.rigs import RIGS, Camera, render_trials
from kinecast.rigs.camera import NEVER_DROP_FIRST, JITTER_CLIP


def weighted_centroid(weight: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Intensity-weighted centroid (x, y) of each frame, pixel-centre coordinates."""
    h, w = weight.shape[1:3]
    yy, xx = np.mgrid[0:h, 0:w]
    mass = weight.sum(axis=(1, 2))
    return (weight * xx).sum(axis=(1, 2)) / mass, (weight * yy).sum(axis=(1, 2)) / mass


def test_pendulum_bob_centroid_follows_truth():
    trial = render_trials("pendulum", frames=30, size=32)[0]
    f = trial.frames.astype(np.float64)
    # The rod, pivot and background are neutral grey (R = G) and the bob is orange, so R − G is the
    # bob's coverage alone; the centroid of a disc is its centre (geometry).
    cx, cy = weighted_centroid(f[..., 0] - f[..., 1])
    assert np.max(np.abs(cx - trial.truth["bob_x_px"])) < 0.05
    assert np.max(np.abs(cy - trial.truth["bob_y_px"])) < 0.05
    assert np.ptp(trial.truth["bob_x_px"]) > 5      # it does swing across pixels


def test_airtable_puck_centroids_follow_truth():
    trial = render_trials("airtable", frames=30, size=48, params={"pucks": 1})[0]
    f = trial.frames.astype(np.float64)
    cx, cy = weighted_centroid(f[..., 0] - f[..., 1])   # puck 0 is red; rails neutral grey
    assert np.max(np.abs(cx - trial.truth["x_0_px"])) < 0.05
    assert np.max(np.abs(cy - trial.truth["y_0_px"])) < 0.05


def test_spring_weight_centroid_follows_truth():
    trial = render_trials("spring", frames=30, size=48)[0]
    f = trial.frames.astype(np.float64)
    _, cy = weighted_centroid(np.clip(f[..., 2] - f[..., 0], 0, None))  # the weight is blue
    assert np.max(np.abs(cy - trial.truth["weight_y_px"])) < 0.05


def test_exposure_blur_centroid_is_mean_of_positions_over_the_exposure():
    camera = Camera(blur=8, exposure=0.9)
    blurred = render_trials("pendulum", frames=12, size=32, camera=camera)[0]
    sharp = render_trials("pendulum", frames=12, size=32)[0]
    f = blurred.frames.astype(np.float64)
    cx, _ = weighted_centroid(f[..., 0] - f[..., 1])
    # The centroid of an average of images of equal-mass shapes is the average of their centroids
    # (linearity); the sub-frame samples are spread evenly over a window centred on the timestamp.
    rig = RIGS["pendulum"]
    window = 0.9 / 30.0
    offsets = (np.arange(8) + 0.5) / 8 * window - window / 2
    expected = []
    for t in blurred.times:
        s = rig.simulate(blurred.params, [blurred.initial["theta"], 0.0], t + offsets)
        expected.append(rig.truth(blurred.params, s, 32)["bob_x_px"].mean())
    assert np.max(np.abs(cx - np.array(expected))) < 0.05
    assert np.any(np.abs(blurred.frames.astype(int) - sharp.frames).max(axis=(1, 2, 3)) > 20)


def test_grey_frames_are_bt601_luma_as_in_opencv():
    rgb = render_trials("airtable", frames=3, size=32, params={"pucks": 3})[0].frames
    grey = render_trials("airtable", frames=3, size=32, params={"pucks": 3}, channels="grey")[0].frames
    assert grey.shape == rgb.shape[:3] + (1,)
    # ITU-R BT.601 luma; OpenCV's RGB2GRAY uses the same weights (OpenCV documentation).
    ref = np.stack([cv2.cvtColor(im, cv2.COLOR_RGB2GRAY) for im in rgb])
    assert np.max(np.abs(grey[..., 0].astype(int) - ref)) <= 1    # both round once


def test_sensor_noise_has_the_requested_standard_deviation():
    clean = render_trials("spring", frames=4, size=64)[0].frames.astype(np.float64)
    noisy = render_trials("spring", frames=4, size=64, camera=Camera(noise=0.02))[0].frames
    diff = noisy - clean
    # Gaussian noise of σ = 0.02 full scale = 5.1 grey levels; rounding adds variance 1/12 level²
    # (uniform quantisation error, common practice) when the noise is wide compared with a level.
    expected = np.sqrt((0.02 * 255) ** 2 + 1 / 12)
    assert diff.std() == pytest.approx(expected, rel=0.03)
    assert abs(diff.mean()) < 0.1


def test_flicker_scales_whole_frames():
    plain = render_trials("pendulum", frames=200, size=16)[0].frames.astype(np.float64)
    lit = render_trials("pendulum", frames=200, size=16, camera=Camera(flicker=0.05))[0].frames
    gain = lit.mean(axis=(1, 2, 3)) / plain.mean(axis=(1, 2, 3))
    assert gain.std() == pytest.approx(0.05, rel=0.2)   # 200 draws: std of the std ≈ 5 %


def test_vignette_darkens_corners_by_the_requested_fraction():
    flat = render_trials("airtable", frames=1, size=64, params={"pucks": 1})[0].frames.astype(float)
    vig = render_trials("airtable", frames=1, size=64, params={"pucks": 1},
                        camera=Camera(vignette=0.4))[0].frames.astype(float)
    ratio = vig[0, 0, 0] / flat[0, 0, 0]                 # a corner pixel (on the rail)
    assert ratio == pytest.approx(0.6, abs=0.02)
    assert vig[0, 31, 31] == pytest.approx(flat[0, 31, 31], abs=1.0)


def test_background_texture_is_static_and_seeded():
    cam = Camera(texture=0.8)
    a = render_trials("spring", trials=2, frames=3, size=32, camera=cam, seed=1)
    b = render_trials("spring", frames=1, size=32, camera=cam, seed=2)[0]
    corner = (slice(None), slice(20, 32), slice(0, 8))    # bottom-left: no rig drawn there
    assert np.array_equal(a[0].frames[corner][0], a[0].frames[corner][2])
    assert np.array_equal(a[0].frames[corner][0], a[1].frames[corner][0])
    assert a[0].frames[corner].std() > 2
    assert not np.array_equal(a[0].frames[corner][0], b.frames[corner][0])


def test_drops_and_jitter():
    fps, jitter = 30.0, 0.004
    trial = render_trials("pendulum", frames=1000, size=16, fps=fps,
                          camera=Camera(drop=0.3, jitter=jitter))[0]
    assert not trial.dropped[:NEVER_DROP_FIRST].any()
    # Binomial(997, 0.3): std ≈ 0.0145; five standard deviations.
    assert trial.dropped[NEVER_DROP_FIRST:].mean() == pytest.approx(0.3, abs=0.073)
    assert np.all(np.diff(trial.times) > 0)
    dev = trial.times - np.arange(1000) / fps
    assert trial.times[0] == 0.0 and np.abs(dev).max() <= JITTER_CLIP / fps
    assert dev[1:].std() == pytest.approx(jitter, rel=0.1)   # clipping at 3σ barely changes it
    assert trial.frames.shape[0] == 1000                       # dropped frames are still rendered


def test_first_frames_are_never_dropped():
    trials = render_trials("spring", trials=4, frames=12, size=16, camera=Camera(drop=0.95))
    for trial in trials:
        assert not trial.dropped[:NEVER_DROP_FIRST].any()
        assert trial.dropped[NEVER_DROP_FIRST:].sum() >= 6   # P(fewer) < 1e-6 at p = 0.95


def test_same_seed_same_trials_and_trials_differ():
    a = render_trials("airtable", trials=3, frames=5, size=16, seed=7)
    b = render_trials("airtable", trials=1, frames=5, size=16, seed=7)
    assert np.array_equal(a[0].frames, b[0].frames)
    assert a[0].initial == b[0].initial
    assert a[0].initial != a[1].initial != a[2].initial
    c = render_trials("airtable", trials=1, frames=5, size=16, seed=8)
    assert a[0].initial != c[0].initial


def test_recording_view_marks_dropped_slots():
    trial = render_trials("spring", frames=40, size=16, camera=Camera(drop=0.3), channels="grey")[0]
    rec = trial.recording()
    assert rec.frames.shape == (40, 1, 16, 16)
    assert np.array_equal(rec.missing, trial.dropped) and trial.dropped.any()
    assert np.all(rec.frames[trial.dropped] == 0)
    kept = ~trial.dropped
    assert np.allclose(rec.frames[kept, 0] * 255, trial.frames[kept, ..., 0])


@pytest.mark.parametrize("kwargs,thing", [
    ({"name": "pendel"}, "rig 'pendel'"),
    ({"frames": 0}, "frames"),
    ({"size": 8}, "size"),
    ({"fps": 0}, "fps"),
    ({"channels": "bgr"}, "channels"),
    ({"camera": Camera(drop=1.5)}, "camera.drop"),
    ({"camera": Camera(blur=0)}, "camera.blur"),
    ({"params": {"damping": -1}}, "parameters of rig 'pendulum'"),
    ({"params": {"colour": 1}}, "parameter 'colour' of rig 'pendulum'"),
])
def test_bad_settings_raise_one_clear_error(kwargs, thing):
    args = {"name": "pendulum", "frames": 3, "size": 16, **kwargs}
    with pytest.raises(KinecastError) as err:
        render_trials(**args)
    assert err.value.thing == thing
    assert "\n" not in str(err.value)


def test_canvas_disc_has_the_area_of_a_circle_and_downsampling_is_a_block_mean():
    from kinecast.rigs.draw import SUPERSAMPLE, Canvas

    canvas = Canvas(np.zeros((40, 40, 3), np.float32))
    canvas.disc(19.3, 20.6, 7.25, (1.0, 0.0, 0.0))
    img = canvas.image()
    assert img[..., 0].sum() == pytest.approx(np.pi * 7.25 ** 2, rel=2e-3)   # area π r² (geometry)
    block = canvas.px.reshape(40, SUPERSAMPLE, 40, SUPERSAMPLE, 3).mean(axis=(1, 3))
    assert np.allclose(img, block, atol=1e-6)
    cx, cy = weighted_centroid(img[None, ..., 0])
    assert abs(cx[0] - 19.3) < 0.01 and abs(cy[0] - 20.6) < 0.01
