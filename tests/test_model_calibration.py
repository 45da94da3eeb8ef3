"""The spread scale of sampled futures (kinecast.model.calibration) and its use in the rollout."""

from __future__ import annotations

import math

import pytest
import torch

from kinecast.config import Config
from kinecast.model import build_model
from kinecast.model.calibration import coverage_scale


@pytest.mark.parametrize("wider", [1.0, 3.0])
def test_coverage_scale_recovers_how_much_wider_the_truth_scatters(wider):
    # Samples N(0, I) in 2-D and a truth N(0, wider² I): distances from the centre follow the
    # Rayleigh law (handbook), so the 0.9 quantile of truth distance / sample radius is `wider`,
    # up to the samples' own mean (factor sqrt((1 + 1/S) / (1 − 1/S))) and the sampling error of
    # each radius, a few per cent with S = 400 (tolerance: 4 %).
    g = torch.Generator().manual_seed(1)
    points = torch.randn(3000, 400, 2, generator=g, dtype=torch.float64)
    truth = wider * torch.randn(3000, 2, generator=g, dtype=torch.float64)
    expected = wider * math.sqrt((1 + 1 / 400) / (1 - 1 / 400))
    assert coverage_scale(points, truth, 0.9) == pytest.approx(expected, rel=0.04)


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
