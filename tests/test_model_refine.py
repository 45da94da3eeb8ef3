"""Keypoint reads refined by the decoder (model/refine.py) against a reference least-squares fit.

The refinement minimises Σ (decoded − frame)² over the keypoint positions alone. With a decoder that
draws a Gaussian blob at each keypoint (a closed-form image), that is the least-squares Gaussian fit
of sub-pixel localisation (common practice: Thompson, Larson and Webb 2002, Biophys. J. 82, 2775,
fit a Gaussian to a spot's pixels by least squares). The reference is scipy's
``scipy.optimize.least_squares`` on the same residuals: both must find the same centre, and with
noise-free frames the centre the frame was drawn at.
"""

import numpy as np
import pytest
import torch
from scipy.optimize import least_squares

from kinecast.config import Config
from kinecast.model import build_model
from kinecast.model.keypoints import draw_blobs
from kinecast.model.refine import refine_positions

SIZE, STD = 32, 0.12  # frame size and blob std (normalised units: 0.12 = 1.9 px at 32 px)
PX = 2.0 / SIZE       # one pixel in normalised units


class BlobDecoder:
    """A stand-in decoder: dark background, one bright Gaussian blob per keypoint (pixel logits)."""

    size = SIZE

    def decode_logits(self, s: torch.Tensor) -> torch.Tensor:
        img = draw_blobs(s.view(s.shape[0], -1, 2), SIZE, STD).sum(1, keepdim=True)  # [N, 1, H, W]
        p = 0.05 + 0.9 * img.clamp(max=1.0)
        return torch.logit(p)


def _frames(points) -> torch.Tensor:
    return torch.sigmoid(BlobDecoder().decode_logits(torch.as_tensor(points, dtype=torch.float64)))


def _scipy_fit(frame: np.ndarray, start: np.ndarray) -> np.ndarray:
    def residuals(xy):
        s = torch.as_tensor(xy, dtype=torch.float64)[None]
        return (_frames(s)[0] - torch.as_tensor(frame)).flatten().numpy()
    return least_squares(residuals, start, xtol=1e-12, ftol=1e-12).x


def test_refinement_finds_the_drawn_centre_like_scipy():
    truth = np.array([[0.137, -0.261], [-0.402, 0.318]])          # two frames, one keypoint each
    frames = _frames(truth)
    start = truth + np.array([[1.5, -1.0], [-0.8, 1.2]]) * PX      # reads 1-2 px off
    got = refine_positions(BlobDecoder(), torch.as_tensor(start), frames, steps=300, step_px=0.05).numpy()
    for i in range(2):
        ref = _scipy_fit(frames[i].numpy(), start[i])
        assert np.allclose(ref, truth[i], atol=1e-6)                # the reference recovers the centre
        assert np.abs(got[i] - ref).max() / PX < 0.02               # refinement: within 0.02 px of it


def test_refinement_matches_scipy_on_a_noisy_frame():
    rng = np.random.default_rng(3)
    truth = np.array([[0.21, 0.05]])
    frame = (_frames(truth) + torch.as_tensor(rng.normal(0, 0.05, (1, 1, SIZE, SIZE)))).clamp(0, 1)
    start = truth + np.array([[0.9, 0.7]]) * PX
    got = refine_positions(BlobDecoder(), torch.as_tensor(start), frame, steps=400, step_px=0.05).numpy()[0]
    ref = _scipy_fit(frame[0].numpy(), start[0])
    assert np.abs(got - ref).max() / PX < 0.02
    assert np.abs(ref - truth[0]).max() / PX > 0.005  # noise moved the optimum: the test sees the fit, not the truth


def test_two_alike_objects_keep_their_order():
    truth = np.array([[-0.3, 0.0, 0.35, 0.1]])                    # two blobs 10 px apart
    frames = _frames(truth)
    start = truth + np.array([[1.0, 1.0, -1.0, 0.5]]) * PX
    got = refine_positions(BlobDecoder(), torch.as_tensor(start), frames, steps=300, step_px=0.05).numpy()
    assert np.abs(got - truth).max() / PX < 0.05


def test_zero_steps_and_no_gradient_into_the_nets():
    model = build_model(Config(), 1)
    s = torch.zeros(2, model.q)
    frames = torch.rand(2, 1, model.size, model.size)
    assert torch.equal(refine_positions(model, s, frames, steps=0, step_px=0.2), s)
    before = [p.detach().clone() for p in model.parameters()]
    out = refine_positions(model, s, frames, steps=5, step_px=0.2)
    assert not out.requires_grad
    assert all(p.grad is None for p in model.parameters())
    assert all(torch.equal(a, b) for a, b in zip(before, model.parameters()))
    assert (out - s).abs().max() <= 5 * 0.2 * 2.0 / model.size + 1e-6  # Adam moves ≤ lr per step


@pytest.mark.parametrize("steps", [0, 4])
def test_read_positions_refines_only_without_gradient(steps):
    cfg = Config()
    cfg.model.read_refinement = steps
    model = build_model(cfg, 1)
    x = torch.rand(3, 1, model.size, model.size)
    raw, _ = model.encode_positions(x)
    with_grad, _ = model.read_positions(x)                         # a training step: the encoder's reads
    assert torch.equal(with_grad, raw)
    with torch.no_grad():
        read, _ = model.read_positions(x)
    assert torch.equal(read, raw.detach()) == (steps == 0)
