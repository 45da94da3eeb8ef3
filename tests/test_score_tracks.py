"""Object tracks and oscillation periods against closed-form physics and handbook formulas."""

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.special import ellipk
from skimage.draw import disk

from kinecast.errors import KinecastError
from kinecast.rigs import Camera, render_trials
from kinecast.score import centroid_track, dominant_period, track_period
from kinecast.frames import tracks

G = 9.81  # m/s^2, standard gravity (rounded; any value works, the period formula uses the same g)
SUPERSAMPLE = 16  # sub-pixel samples per pixel side when rendering anti-aliased discs


def render_disc(centres, size=64, radius=5.0, level=0.9, background=None, channels=1):
    """Frames (T, C, H, W) of a disc of intensity ``level`` at each (x, y) centre, anti-aliased by
    supersampling (pixel value = covered area share, pixel centres at integer coordinates)."""
    bg = np.full((size, size), 0.2) if background is None else np.asarray(background, float)
    sub = (np.arange(size * SUPERSAMPLE) + 0.5) / SUPERSAMPLE - 0.5
    out = []
    for cx, cy in np.atleast_2d(centres):
        inside = ((sub[None, :] - cx) ** 2 + (sub[:, None] - cy) ** 2) <= radius ** 2
        cover = inside.reshape(size, SUPERSAMPLE, size, SUPERSAMPLE).mean(axis=(1, 3))
        out.append(bg * (1 - cover) + level * cover)
    frames = np.stack(out)[:, None].astype(np.float32)
    return np.repeat(frames, channels, axis=1)


def pendulum_theta(theta0, length, times):
    """theta(t) of the undamped pendulum theta'' = -(g/L) sin(theta), released at rest, from
    scipy.integrate.solve_ivp at tight tolerance (reference integrator)."""
    sol = solve_ivp(lambda t, y: [y[1], -G / length * np.sin(y[0])], (0.0, times[-1]), [theta0, 0.0],
                    t_eval=times, rtol=1e-10, atol=1e-12, method="DOP853")
    return sol.y[0]


def exact_pendulum_period(theta0, length):
    # Handbook formula: T = 4 sqrt(L/g) K(k^2), k = sin(theta0 / 2), K the complete elliptic integral
    # of the first kind (scipy.special.ellipk takes the parameter m = k^2).
    return 4.0 * np.sqrt(length / G) * ellipk(np.sin(theta0 / 2.0) ** 2)


@pytest.mark.parametrize("channels", [1, 3])
def test_centroid_of_antialiased_disc_is_its_centre(channels):
    # Geometry: the area centroid of a disc is its centre. Anti-aliased pixels carry the covered
    # area, so the intensity-weighted centroid over a flat background recovers it; 0.1 px is the
    # accuracy asked of the tracker.
    centres = np.array([[20.3, 31.7], [40.55, 12.25], [31.0, 30.0], [9.8, 50.1]])
    frames = render_disc(centres, channels=channels)
    bg = np.full((channels, 64, 64), 0.2, np.float32)
    track = centroid_track(frames, bg)
    assert track.shape == (4, 2)
    assert np.abs(track - centres).max() < 0.1


def test_centroid_track_of_a_long_recording_is_tracked_block_by_block(monkeypatch):
    # Geometry, as above: the centroid of an anti-aliased disc is its centre. A recording longer
    # than tracks.TRACK_BLOCK frames is tracked in blocks (bounded memory); every frame is tracked
    # on its own, so the blocks give the same track as one piece, and the median background (None)
    # is still taken over all frames.
    n = 2 * tracks.TRACK_BLOCK + 37
    angle = np.linspace(0.0, 6 * np.pi, n)
    centres = np.stack([32 + 18 * np.cos(angle), 32 + 18 * np.sin(angle)], axis=1)
    frames = np.concatenate([render_disc(centres[i:i + 100]) for i in range(0, n, 100)])
    blocked = centroid_track(frames)
    assert np.abs(blocked - centres).max() < 0.1
    monkeypatch.setattr(tracks, "TRACK_BLOCK", 10 * n)
    assert np.array_equal(blocked, centroid_track(frames))


def test_centroid_of_drawn_disc_with_median_background_and_noise():
    # skimage.draw.disk at an integer centre gives a pixel set symmetric about the centre, so its
    # centroid is the centre exactly (symmetry). The background defaults to the per-pixel median over
    # frames in which the disc sits elsewhere; noise (sigma 0.01) must not move the centroid by
    # more than 0.1 px.
    rng = np.random.default_rng(3)
    centres = [(12, 15), (30, 40), (50, 22), (45, 50), (20, 52)]
    frames = np.full((len(centres), 1, 64, 64), 0.3, np.float32)
    for k, (x, y) in enumerate(centres):
        rr, cc = disk((y, x), 4, shape=(64, 64))
        frames[k, 0, rr, cc] = 0.8
    frames = np.clip(frames + rng.normal(0.0, 0.01, frames.shape), 0, 1).astype(np.float32)
    track = centroid_track(frames)
    assert np.abs(track - np.array(centres, float)).max() < 0.1


def test_centroid_is_nan_without_foreground():
    # A frame equal to the background holds no object (definition of the foreground).
    bg = np.full((1, 32, 32), 0.4, np.float32)
    frames = np.stack([bg, render_disc([(10.0, 12.0)], size=32, background=bg[0])[0]])
    track = centroid_track(frames, bg)
    assert np.all(np.isnan(track[0]))
    assert np.abs(track[1] - [10.0, 12.0]).max() < 0.1


def test_centroid_rejects_mismatched_background():
    with pytest.raises(KinecastError):
        centroid_track(np.zeros((2, 1, 8, 8)), np.zeros((1, 9, 9)))


def test_pendulum_period_from_rendered_frames_matches_elliptic_integral():
    # Handbook formula (elliptic integral) vs the period measured from rendered frames of a pendulum
    # bob released at 60 degrees; 1% accuracy is the target. The bob's y oscillates at twice the
    # frequency, so choosing the wrong direction would give half the period.
    theta0, length = np.radians(60.0), 0.5
    period = exact_pendulum_period(theta0, length)
    times = np.arange(0.0, 3.2 * period, 1.0 / 30.0)  # 30 frames per second
    theta = pendulum_theta(theta0, length, times)
    pivot, arm = np.array([32.0, 6.0]), 24.0  # pixels
    centres = pivot + arm * np.stack([np.sin(theta), np.cos(theta)], axis=1)
    frames = render_disc(centres, radius=3.0)
    track = centroid_track(frames)
    assert np.abs(track - centres).max() < 0.1
    assert track_period(track, times) == pytest.approx(period, rel=0.01)


@pytest.mark.parametrize("camera", [Camera(), Camera(noise=0.02, jitter=0.003, texture=0.3,
                                                      drop=0.05)])
def test_pendulum_period_from_the_synthetic_rig(camera):
    # The project's pendulum rig (undamped, released at 60 degrees, seen through a clean and through
    # an imperfect camera: noise, timing jitter, textured background, dropped frames) against the
    # handbook elliptic-integral period; 1% is the target. The rod moves with the bob, so the
    # centroid is not the bob's, but it swings with the same period.
    params = {"damping": 0.0, "amp_min_deg": 60.0, "amp_max_deg": 60.0}
    trial = render_trials("pendulum", frames=110, size=64, fps=30.0, params=params, camera=camera)[0]
    assert trial.initial["theta"] == pytest.approx(np.radians(60.0))
    rec = trial.recording()
    seen = ~rec.missing
    track = centroid_track(rec.frames[seen])
    period = exact_pendulum_period(np.radians(60.0), trial.params["length_m"])
    assert trial.params["gravity"] == G  # the formula above uses the same g
    assert track_period(track, rec.times[seen]) == pytest.approx(period, rel=0.01)


@pytest.mark.parametrize("cycles", [1.6, 2.5, 4.0])
def test_pendulum_period_on_irregular_times(cycles):
    # Same handbook formula; irregular sampling (random instants) and spans of few or non-whole
    # cycles.
    rng = np.random.default_rng(int(cycles * 10))
    theta0, length = np.radians(60.0), 1.2
    period = exact_pendulum_period(theta0, length)
    times = np.sort(rng.uniform(0.0, cycles * period, int(40 * cycles)))
    theta = pendulum_theta(theta0, length, times)
    assert dominant_period(np.sin(theta), times) == pytest.approx(period, rel=0.01)


def test_small_angle_limit():
    # Small-angle period T = 2 pi sqrt(L/g) (textbook); at 2 degrees the exact period exceeds it by
    # under 0.01% (theta0^2/16 series term), well inside the 1% checked.
    length = 0.25
    times = np.linspace(0.0, 5.0, 300)
    theta = pendulum_theta(np.radians(2.0), length, times)
    assert dominant_period(theta, times) == pytest.approx(2 * np.pi * np.sqrt(length / G), rel=0.01)


def test_damped_oscillator_with_drift():
    # Closed form x(t) = A e^(-gamma t) cos(omega_d t + phi), omega_d = sqrt(omega0^2 - gamma^2); the
    # period is 2 pi / omega_d. A slow linear drift (camera or table creep) is added and must not
    # change it.
    omega0, gamma = 2 * np.pi / 0.8, 0.4
    omega_d = np.sqrt(omega0 ** 2 - gamma ** 2)
    times = np.cumsum(np.random.default_rng(5).uniform(0.01, 0.05, 200))
    x = 10 * np.exp(-gamma * times) * np.cos(omega_d * times + 0.7) + 1.5 * times
    assert dominant_period(x, times) == pytest.approx(2 * np.pi / omega_d, rel=0.01)


def test_period_along_a_tilted_line():
    # A spring rig on an incline: motion along a 30 degree line, period 1.3 s (closed-form
    # sinusoid); the first principal component recovers the direction whatever the axes.
    times = np.linspace(0.0, 6.0, 181)
    s = 12 * np.sin(2 * np.pi * times / 1.3)
    track = np.stack([30 + s * np.cos(np.radians(30)), 20 + s * np.sin(np.radians(30))], axis=1)
    track[[10, 50]] = np.nan  # frames with no object are skipped
    assert track_period(track, times) == pytest.approx(1.3, rel=0.01)


def test_noisy_signal_uses_spectrum():
    # Heavy noise makes zero crossings irregular, so the spectral (Lomb-Scargle) estimate is used.
    # Tolerance: 5 x the Cramer-Rao bound on the frequency of a sinusoid in white noise,
    # var(w) >= 12 sigma^2 / (A^2 N (N^2 - 1)) per sample (Rife & Boorstyn 1974; from memory).
    rng = np.random.default_rng(11)
    period, n, sigma = 1.7, 300, 0.7
    times = np.sort(rng.uniform(0.0, 8 * period, n))
    x = np.sin(2 * np.pi * times / period + 1.0) + sigma * rng.standard_normal(n) + 0.3 * times
    detrended = x - np.polyval(np.polyfit(times, x, 1), times)
    assert np.isnan(tracks._crossing_period(times, detrended))  # the fallback is what is tested
    w_per_sample = 2 * np.pi * 8 / n
    rel_std = np.sqrt(12 * sigma ** 2 / (n * (n ** 2 - 1))) / w_per_sample
    assert dominant_period(x, times) == pytest.approx(period, rel=5 * rel_std)


def test_too_few_cycles_give_nan():
    # Under MIN_CYCLES (1.5) periods in the samples there is no period to report (documented rule).
    times = np.linspace(0.0, 1.2, 100)
    assert np.isnan(dominant_period(np.sin(2 * np.pi * times), times))
    assert np.isnan(dominant_period(np.full(100, 3.0), times))
    times = np.linspace(0.0, 2.0, 100)
    assert dominant_period(np.sin(2 * np.pi * times), times) == pytest.approx(1.0, rel=0.01)


def test_period_rejects_bad_times():
    with pytest.raises(KinecastError):
        dominant_period(np.zeros(10), np.zeros(9))
    with pytest.raises(KinecastError):
        dominant_period(np.sin(np.arange(10.0)), np.r_[np.arange(9.0), 3.0])


@pytest.mark.parametrize("drawn_blur", [0.6, 1.2])
def test_a_smoothly_drawn_copy_is_tracked_where_the_sharp_frame_is(drawn_blur):
    # A blob hanging under a one-pixel zigzag (a spring's mass and coil), and the same frame through
    # OpenCV's Gaussian blur (reference low-pass): a forecast drawn at model resolution looks like
    # the second. Convolution with a symmetric kernel keeps the first moment of an image (handbook
    # property of convolution), so both should be tracked at nearly one position.
    import cv2

    sharp = render_disc([(32.0, 44.0)], radius=4.0, level=0.9)[0, 0]
    for row in range(8, 38):  # the coil: one pixel wide, full contrast, left and right of the axis
        sharp[row, 32 + (3 if (row // 3) % 2 else -3)] = 0.9
    smooth = cv2.GaussianBlur(sharp, (0, 0), drawn_blur, borderType=cv2.BORDER_REPLICATE)
    bg = np.full((1, 64, 64), 0.2, np.float32)
    frames = np.stack([sharp, smooth])[:, None]
    xy = centroid_track(frames, bg)
    assert np.hypot(*(xy[0] - xy[1])) < 0.5
    # the same comparison without the tracker's low-pass: the offset it exists to remove
    fg = tracks.foreground(frames, bg, blur=0.0)
    w = np.where(tracks.foreground_mask(fg), fg, 0.0)
    y_centres = (w.sum(axis=2) * np.arange(64)).sum(axis=1) / w.sum(axis=(1, 2))
    if drawn_blur >= 1.0:
        assert abs(y_centres[0] - y_centres[1]) > 2.0
