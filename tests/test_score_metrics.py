"""Per-frame metrics against scikit-image, their definitions and known statistical answers."""

import numpy as np
import pytest
from scipy.ndimage import shift as nd_shift
from scipy.stats import norm
from skimage import data
from skimage.metrics import mean_squared_error, peak_signal_noise_ratio, structural_similarity
from skimage.transform import resize

from kinecast.errors import KinecastError
from kinecast.score import band_coverage, frame_metrics, mae, mse, position_coverage, psnr, ssim, valid_horizon
from test_score_tracks import render_disc


def structured_pairs(channels, size=48):
    """A real photograph (skimage.data, grey or RGB) resized, and versions of it shifted by a
    sub-pixel amount, noised and darkened: (truth, pred), each (3, C, H, W) in [0, 1]."""
    img = data.camera() if channels == 1 else data.astronaut()
    img = resize(img, (size, size), anti_aliasing=True).astype(np.float64)
    img = img[..., None] if img.ndim == 2 else img
    chw = np.moveaxis(img, -1, 0)
    rng = np.random.default_rng(channels)
    moved = np.stack([nd_shift(c, (0.6, -1.3), mode="nearest") for c in chw])
    noisy = chw + rng.normal(0.0, 0.05, chw.shape)
    dark = 0.7 * chw
    pred = np.clip(np.stack([moved, noisy, dark]), 0, 1)
    return np.stack([chw] * 3), pred


def skimage_ssim(pred, truth, win=7):
    # Reference: skimage.metrics.structural_similarity (Wang et al. 2004) with its defaults for float
    # images: uniform window, sample covariance; data_range 1 and channels on axis 0.
    return np.array([structural_similarity(t, p, win_size=win, data_range=1.0, channel_axis=0)
                     for p, t in zip(pred, truth)])


@pytest.mark.parametrize("channels", [1, 3])
def test_ssim_and_psnr_match_skimage_on_random_frames(channels):
    rng = np.random.default_rng(7)
    truth = rng.random((4, channels, 33, 40))
    pred = np.clip(truth + rng.normal(0.0, 0.1, truth.shape), 0, 1)
    pred[0] = truth[0]
    got = ssim(pred.astype(np.float32), truth.astype(np.float32))
    assert got.shape == (4,)
    assert np.abs(got - skimage_ssim(pred, truth)).max() < 1e-4
    assert got[0] == pytest.approx(1.0, abs=1e-12)  # identical frames: SSIM = 1 by definition
    ref = [peak_signal_noise_ratio(t, p, data_range=1.0) for p, t in zip(pred[1:], truth[1:])]
    assert np.abs(psnr(pred, truth)[1:] - ref).max() < 1e-4


@pytest.mark.parametrize("channels", [1, 3])
def test_ssim_and_psnr_match_skimage_on_photographs(channels):
    truth, pred = structured_pairs(channels)
    assert np.abs(ssim(pred, truth) - skimage_ssim(pred, truth)).max() < 1e-4
    ref = [peak_signal_noise_ratio(t, p, data_range=1.0) for p, t in zip(pred, truth)]
    assert np.abs(psnr(pred, truth) - ref).max() < 1e-4


@pytest.mark.parametrize("win", [3, 11])
def test_ssim_window_matches_skimage_win_size(win):
    truth, pred = structured_pairs(1, size=40)
    assert np.abs(ssim(pred, truth, win) - skimage_ssim(pred, truth, win)).max() < 1e-4


def test_ssim_rejects_bad_window():
    frames = np.zeros((1, 1, 8, 8))
    for win in (4, 9):  # even; larger than the frame
        with pytest.raises(KinecastError):
            ssim(frames, frames, win)


def test_psnr_hand_computed():
    # Definition: PSNR = 10 log10(MAX^2 / MSE); an error of 0.1 everywhere gives MSE 0.01 and
    # exactly 20 dB with MAX = 1; identical frames have MSE 0 and infinite PSNR.
    truth = np.full((2, 1, 8, 8), 0.5)
    pred = truth.copy()
    pred[1] += 0.1
    got = psnr(pred, truth)
    assert np.isinf(got[0]) and got[0] > 0
    assert got[1] == pytest.approx(20.0, abs=1e-9)


def test_mse_and_mae_follow_their_definitions():
    # Definitions: mean of squared / absolute differences over all values of a frame; cross-checked
    # with skimage.metrics.mean_squared_error per frame.
    rng = np.random.default_rng(2)
    truth, pred = rng.random((2, 5, 3, 6, 7))
    assert np.allclose(mse(pred, truth), [mean_squared_error(t, p) for p, t in zip(pred, truth)])
    assert np.allclose(mae(pred, truth), np.abs(pred - truth).reshape(5, -1).mean(axis=1))
    with pytest.raises(KinecastError):
        mse(pred[:, :2], truth)


def test_frame_metrics_position_error_is_the_centroid_distance():
    # Pythagoras: a disc displaced by (3, 4) px is 5 px away; a perfect prediction is 0 px away.
    truth = render_disc([(20.0, 20.0), (30.0, 25.0)])
    pred = render_disc([(23.0, 24.0), (30.0, 25.0)])
    bg = np.full((1, 64, 64), 0.2, np.float32)
    out = frame_metrics(pred, truth, background=bg)
    assert set(out) == {"mse", "mae", "psnr", "ssim", "position_error_px", "x_px", "y_px", "true_x_px", "true_y_px"}
    assert all(v.shape == (2,) for v in out.values())
    assert out["position_error_px"] == pytest.approx([5.0, 0.0], abs=0.1)
    # the centroids themselves: the discs' centres (render_disc draws them at these pixel coordinates)
    assert np.c_[out["true_x_px"], out["true_y_px"]] == pytest.approx(np.array([[20.0, 20.0], [30.0, 25.0]]), abs=0.1)
    assert np.c_[out["x_px"], out["y_px"]] == pytest.approx(np.array([[23.0, 24.0], [30.0, 25.0]]), abs=0.1)
    assert out["ssim"][1] == pytest.approx(1.0) and out["ssim"][0] < 1.0
    # an empty predicted frame has no object: no position error can be given
    empty = np.broadcast_to(bg, truth.shape)
    assert np.isnan(frame_metrics(empty, truth, background=bg)["position_error_px"]).all()


def test_valid_horizon_cases():
    # Definition: the horizon ends at the first frame whose SSIM is below the threshold. SSIM falling
    # by 0.06 a frame from 1 stays at or above 0.8 for frames 0..3 (1 - 0.06 k >= 0.8 <=> k <= 3.3),
    # and frame 3 is at 0.5 s.
    times = np.array([0.1, 0.2, 0.3, 0.5, 0.6, 0.9, 1.0])
    falling = 1.0 - 0.06 * np.arange(7)
    assert valid_horizon(falling, times, 0.8, origin=0.0) == (4, pytest.approx(0.5))
    # all valid: the whole forecast, from the default origin one median interval (0.1 s) before
    # the first forecast frame, i.e. 0.0 s
    assert valid_horizon(np.ones(7), times, 0.8) == (7, pytest.approx(1.0))
    # the first frame already fails; NaN counts as a failure
    assert valid_horizon([0.5, 0.9], [1.0, 2.0], 0.8, origin=0.0) == (0, 0.0)
    assert valid_horizon([0.9, np.nan, 0.9], [1.0, 2.0, 3.0], 0.8, origin=0.0)[0] == 1
    with pytest.raises(KinecastError):
        valid_horizon([0.9], [1.0], 0.8)


def test_band_coverage_of_calibrated_samples():
    # Truth and S samples drawn from the same normal: a new draw falls between the i-th and j-th of
    # S order statistics with probability (j - i) / (S + 1), whatever the distribution (order
    # statistics; David & Nagaraja, "Order Statistics", from memory), so the band, widened for S,
    # holds it with probability `band`; the plain (1 ± band) / 2 quantiles would hold it
    # band (S - 1) / (S + 1) = 0.855 of the time with S = 39. Pixels are independent, so the covered
    # count is binomial; tolerance 4 standard deviations over all frames (common practice).
    rng = np.random.default_rng(0)
    s_count, shape, band = 39, (3, 1, 24, 24), 0.9
    samples = rng.normal(0.3, 0.1, (s_count, *shape))
    truth = rng.normal(0.3, 0.1, shape)
    got = band_coverage(samples, truth, band)
    assert got.shape == (3,)
    assert abs(got.mean() - band) < 4 * np.sqrt(band * (1 - band) / truth.size)


def test_band_coverage_of_overconfident_samples():
    # Truth spread twice as wide as the samples: the central 90% interval +-1.645 sigma covers the
    # truth with probability 2 Phi(1.645 / 2) - 1 (normal distribution; scipy.stats.norm). Binomial
    # tolerance as above plus 0.01 for the sampling error of the interval ends (S = 999).
    rng = np.random.default_rng(1)
    samples = rng.normal(0.0, 1.0, (999, 2, 1, 24, 24))
    truth = rng.normal(0.0, 2.0, (2, 1, 24, 24))
    expected = 2 * norm.cdf(norm.ppf(0.95) / 2) - 1
    got = band_coverage(samples, truth, 0.9)
    assert np.abs(got - expected).max() < 4 * np.sqrt(expected * (1 - expected) / 576) + 0.01
    # truth far outside every sample: nothing covered; truth at the centre: everything covered
    assert band_coverage(samples, truth * 0 + 10.0, 0.9).max() == 0.0
    assert band_coverage(samples, truth * 0, 0.9).min() == 1.0


def test_band_coverage_rejects_bad_input():
    with pytest.raises(KinecastError):
        band_coverage(np.zeros((1, 2, 1, 4, 4)), np.zeros((2, 1, 4, 4)))
    with pytest.raises(KinecastError):
        band_coverage(np.zeros((5, 2, 1, 4, 4)), np.zeros((2, 1, 4, 4)), band=0.0)


def test_band_coverage_over_a_region_counts_only_its_pixels():
    # exact by construction: truth at the samples' centre on the left half (always inside the band),
    # far outside every sample on the right half (never inside)
    rng = np.random.default_rng(2)
    samples = rng.normal(0.0, 1.0, (50, 3, 1, 8, 8))
    truth = np.zeros((3, 1, 8, 8))
    truth[..., 4:] = 10.0
    left = np.zeros((3, 8, 8), bool)
    left[..., :4] = True
    np.testing.assert_array_equal(band_coverage(samples, truth, 0.9, region=left), [1.0, 1.0, 1.0])
    np.testing.assert_array_equal(band_coverage(samples, truth, 0.9, region=~left), [0.0, 0.0, 0.0])
    empty = left.copy()
    empty[1] = False
    got = band_coverage(samples, truth, 0.9, region=empty)
    assert got[0] == 1.0 and np.isnan(got[1])


@pytest.mark.parametrize("s_count, sigma_ratio", [(12, 1.0), (40, 1.0), (30, 1 / 3)])
def test_position_coverage_of_discs_follows_the_rayleigh_law(s_count, sigma_ratio):
    # The truth and S samples are discs whose centres scatter around a common point, the truth with
    # std sigma per axis, the samples with sigma_ratio·sigma. Distances in 2-D from the centre follow
    # the Rayleigh law, P(R <= r) = 1 − exp(−r² / 2s²) (handbook). Calibrated samples (ratio 1): the
    # truth is one more draw of the samples' law, so the region holds it with probability 0.9 for
    # any number of samples (a new draw's rank among S is uniform over S + 1 places: order
    # statistics, David & Nagaraja, from memory); with 12 samples the plain 0.9 quantile of the
    # samples' distances held it ~0.79 of the time. Over-confident samples (ratio 1/3): the radius is
    # the level-q quantile, q = (0.9 (S + 1) − 1) / (S − 1), of distances ~ Rayleigh(sigma_ratio·sigma)
    # (from the others' mean), ≈ sigma_ratio·sigma·sqrt(−2 ln(1 − q)); the truth lies at
    # ~ Rayleigh(sigma·sqrt(1 + sigma_ratio²/S)) from the samples' mean. Frames are independent:
    # binomial tolerance, 4 standard deviations plus 0.02 for the radius's own sampling error.
    rng = np.random.default_rng(3)
    frames, sigma = 400, 2.0
    centre = rng.uniform(12, 20, (frames, 2))
    truth = render_disc(centre + rng.normal(0, sigma, (frames, 2)), size=32, radius=3.0)
    samples = np.stack([render_disc(centre + rng.normal(0, sigma_ratio * sigma, (frames, 2)), size=32,
                                    radius=3.0) for _ in range(s_count)])
    background = np.full((1, 32, 32), 0.2)
    got = position_coverage(samples, truth, background, 0.9)
    q = (0.9 * (s_count + 1) - 1) / (s_count - 1)
    expected = 1 - (1 - q) ** (sigma_ratio ** 2 / (1 + sigma_ratio ** 2 / s_count))
    if sigma_ratio == 1.0:
        expected = 0.9
    assert got.shape == (frames,) and set(np.unique(got)) <= {0.0, 1.0}
    assert abs(got.mean() - expected) < 4 * np.sqrt(expected * (1 - expected) / frames) + 0.02, s_count
