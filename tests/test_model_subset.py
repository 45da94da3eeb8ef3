"""Decoding a random subset of a window's frames gives an unbiased estimate of the full likelihood.

Reference: simple random sampling without replacement — the expected sample mean equals the
population mean (any sampling textbook, e.g. Cochran, "Sampling Techniques", ch. 2; from memory).
Here the "population" is the per-frame negative log-likelihood over a window.
"""

import torch

from kinecast.config import Config
from kinecast.model import build_model


def _tiny(seed: int, agreement_weight: float):
    """A small model, 2 random 12-frame windows, their times and an all-present mask."""
    torch.manual_seed(seed)
    cfg = Config()
    cfg.data.size = 32
    cfg.model.enc_channels = cfg.model.dec_channels = 8
    cfg.model.hidden = 16
    cfg.model.agreement_weight = agreement_weight
    cfg.solver.time_scale = 3.0
    return (build_model(cfg, 1).eval(), torch.rand(2, 12, 1, 32, 32), torch.arange(12) * 0.1,
            torch.ones(2, 12, dtype=torch.bool))


def test_subset_nll_is_unbiased_and_cheaper_windows_keep_shapes():
    model, frames, t, mask = _tiny(0, 0.0)
    mask[0, 7] = False  # a dropped frame must stay out of both estimates
    with torch.no_grad():
        full = model(frames, t, 100, mask=mask, sample=False)["nll"]
        draws = torch.stack([model(frames, t, 100, mask=mask, sample=False, decode_frames=4)["nll"]
                             for _ in range(400)])
        sub = model(frames, t, 100, mask=mask, sample=False, decode_frames=4)
    # mean of 400 draws within 4 standard errors of the full value (common practice for a z-check)
    se = draws.std() / 400 ** 0.5
    assert abs(draws.mean() - full) <= 4 * se + 1e-7
    assert draws.std() > 0  # the subset really varies
    assert sub["recon"].shape == (2, 4, 1, 32, 32)


def test_agreement_on_a_frame_subset_is_unbiased_and_exact_when_all_fit():
    # same reference as above: simple random sampling without replacement is unbiased for the total
    model, frames, t, mask = _tiny(1, 1.0)
    mask[1, 5] = False  # a dropped frame stays out of both
    with torch.no_grad():
        full = model(frames, t, 100, mask=mask, sample=False)["agreement"]
        same = model(frames, t, 100, mask=mask, sample=False, agreement_frames=11)["agreement"]
        draws = torch.stack([model(frames, t, 100, mask=mask, sample=False, agreement_frames=3)["agreement"]
                             for _ in range(400)])
    torch.testing.assert_close(same, full)      # 11 later frames: all of them, nothing drawn
    se = draws.std() / 400 ** 0.5
    assert draws.std() > 0
    assert abs(draws.mean() - full) <= 4 * se + 1e-7
