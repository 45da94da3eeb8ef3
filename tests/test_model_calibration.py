"""The spread scale of sampled futures (kinecast.model.calibration) and its use in the rollout."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy import stats

from kinecast.config import Config
from kinecast.model import build_model
from kinecast.model.calibration import band_inside, coverage_scale, noise_for_coverage


@pytest.mark.parametrize("wider, s_count", [(1.0, 400), (3.0, 400), (1.0, 16)])
def test_coverage_scale_recovers_how_much_wider_the_truth_scatters(wider, s_count):
    # Samples N(0, I) in 2-D and a truth N(0, wider² I). The central region holds a new draw of the
    # samples' law with probability 0.9 whatever their number (a new draw's rank among S samples is
    # uniform over S + 1 places: order statistics, David & Nagaraja, from memory), and distances in
    # 2-D follow the Rayleigh law (handbook), which scales with the spread: the factor is `wider`,
    # up to the sampling error of each radius and of the 0.9 quantile over 3000 cases (tolerance 4 %).
    # With 16 samples the plain 0.9 quantile of the samples' distances asked for ~1.16.
    g = torch.Generator().manual_seed(1)
    points = torch.randn(3000, s_count, 2, generator=g, dtype=torch.float64)
    truth = wider * torch.randn(3000, 2, generator=g, dtype=torch.float64)
    assert coverage_scale(points, truth, 0.9) == pytest.approx(wider, rel=0.04)


def test_rollout_spreads_samples_about_their_mean_by_the_scale():
    # the scale multiplies each sample's deviation from the samples' mean and leaves the mean alone
    cfg = Config()
    cfg.data.size = 32
    model = build_model(cfg, 1)
    ctx, t = torch.rand(1, 3, 1, 32, 32), torch.linspace(0, 1, 6)
    with torch.no_grad():
        _, a = model.rollout(ctx, t, samples=5, mean_weights=False, sample_init=True,
                             generator=torch.Generator().manual_seed(3))
        model.spread_scale.fill_(2.5)
        _, b = model.rollout(ctx, t, samples=5, mean_weights=False, sample_init=True,
                             generator=torch.Generator().manual_seed(3))
    torch.testing.assert_close(b.mean(0), a.mean(0))
    torch.testing.assert_close(b - b.mean(0), 2.5 * (a - a.mean(0)))
    assert float((a - a.mean(0)).abs().max()) > 0  # the samples do differ


@pytest.mark.parametrize("noise", [0.0, 0.2])
def test_band_with_pixel_noise_covers_as_the_normal_law_says(noise):
    # Samples N(0, 0.1²) blurred by noise N(0, noise²) stand for N(0, 0.1² + noise²) (sum of
    # independent normals, handbook); a truth N(0, 0.3²) lies inside that law's central 90 % interval
    # with probability P(|z| < 1.645 · sqrt(0.1² + noise²) / 0.3) (normal quantiles from scipy.stats).
    # 20000 truths: binomial standard error below 0.0035; tolerance 0.015 also covers the samples'
    # own finite number (300).
    rng = np.random.default_rng(2)
    samples = 0.1 * rng.standard_normal((300, 20000))
    truth = 0.3 * rng.standard_normal(20000)
    spread = math.hypot(0.1, noise)
    expected = 2 * stats.norm.cdf(stats.norm.ppf(0.95) * spread / 0.3) - 1
    assert band_inside(samples, truth, 0.9, noise).mean() == pytest.approx(expected, abs=0.015)


def test_fitted_pixel_noise_is_the_missing_spread():
    # The truth scatters with std 0.3 around samples of std 0.1: the noise that makes the 90 % band
    # cover 90 % of it is sqrt(0.3² − 0.1²) ≈ 0.283 (variances of independent normals add); samples
    # that already cover the truth need none.
    rng = np.random.default_rng(3)
    samples = 0.1 * rng.standard_normal((300, 20000))
    truth = 0.3 * rng.standard_normal(20000)
    assert noise_for_coverage(samples, truth, 0.9) == pytest.approx(math.sqrt(0.3**2 - 0.1**2), rel=0.04)
    assert noise_for_coverage(samples, 0.05 * rng.standard_normal(20000), 0.9) == 0.0


@pytest.mark.parametrize("n_frames, missing, expected", [
    (90, [], [0, 20]),              # room for two whole 63-frame forecasts one window apart
    (30, [], [0]),                  # shorter than one forecast: the first clip alone, cut short
    (90, [0, 1], [2, 22]),          # context frames must be present: the first start moves on
    (200, [], [0, 20, 40, 80, 100, 120]),  # 7 fit; at most CALIBRATION_CLIPS = 6, spread evenly
])
def test_calibration_clips_cover_several_phases_of_each_held_out_trial(n_frames, missing, expected):
    # Our own rule (kinecast.train.loop.calibration_starts): the first forecast the trial allows,
    # then one per training window (horizon / 3) whose whole forecast fits, so the spread scale rests
    # on several rollouts per trial instead of one.
    from kinecast.frames.recording import Recording
    from kinecast.train.loop import calibration_starts

    k, horizon = 3, 60
    gone = np.zeros(n_frames, bool)
    gone[missing] = True
    rec = Recording(np.zeros((n_frames, 1, 2, 2), np.float32), np.arange(n_frames) / 30.0, gone, "t")
    starts = calibration_starts(rec.present_runs(k), n_frames, k, horizon)
    assert starts == expected
    assert all(a + k + horizon <= n_frames for a in starts[1:])
    assert all(not gone[a:a + k].any() for a in starts)


@pytest.mark.parametrize("s_count", [4, 8])
def test_too_few_futures_cannot_reach_the_band_and_the_score_says_so(s_count):
    # A new draw's rank among S samples is uniform over S + 1 places (order statistics, David &
    # Nagaraja, from memory): no region built from S samples holds it more often than S / (S + 1),
    # below 0.9 for S < 9. Measured on 2-D normal draws (20000 cases, binomial tolerance 4 sd), and
    # the score's coverage sentence says the futures are too few.
    from kinecast.model.calibration import disc_radius
    from kinecast.score.evaluate import coverage_text

    rng = np.random.default_rng(5)
    pts, new = rng.normal(size=(20000, s_count, 2)), rng.normal(size=(20000, 2))
    centre = pts.mean(axis=1)
    inside = np.linalg.norm(new - centre, axis=-1) <= disc_radius(np.linalg.norm(pts - centre[:, None], axis=-1), 0.9)
    cap = s_count / (s_count + 1)
    assert abs(inside.mean() - cap) < 4 * math.sqrt(cap * (1 - cap) / 20000) + 0.01
    summary = {"mean_position_coverage": inside.mean(), "mean_object_band_coverage": 0.9}
    assert "too few" in coverage_text(summary, 0.9, s_count)
    assert "too few" not in coverage_text(summary, 0.9, 16)
