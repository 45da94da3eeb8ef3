"""Keypoint encoder pieces and the dynamics stage, against closed forms.

- The spatial softmax of the log of a Gaussian is that Gaussian, normalised; its expected position is
  the Gaussian's centre (closed form; exact up to the truncation at the frame edge, negligible for a
  narrow blob well inside the frame).
- Drawn blobs are separable Gaussians: exp(−((x−cx)² + (y−cy)²) / 2σ²) (closed form).
- The dynamics stage, given clean encoded trajectories of a harmonic oscillator x(t) = A·cos(ωt)
  (closed form), learns a field whose free rollout keeps the period 2π/ω.
- The foreground coverage term is the soft k-means distortion of the foreground mass; k-means' fixed
  points put each centre at the centroid of the mass assigned to it (Lloyd 1982, "Least squares
  quantization in PCM", IEEE Trans. Inf. Theory 28), and the centroid of a symmetric blob is its
  centre (closed form). The robust noise scale 1.4826·MAD is a handbook constant (σ of a Gaussian).
- Read within a window around its peak, a map holding a second, weaker Gaussian bump far away gives
  the main bump's own centre (closed form, up to the window's truncation of the bump at 3.5σ, below
  1e-3 of a cell); over the whole map it gives the mass-weighted mean of the two centres (closed form).
- A shared per-object field is one function applied to each object's own state: swapping two objects'
  states swaps their accelerations (permutation equivariance, by definition).
- The second-order one-sided difference (−3·f0 + 4·f1 − f2)/2h is exact for quadratics (handbook
  finite-difference formula; its error term is O(h²)·f''').
"""

import math

import numpy as np
import pytest
import torch

from kinecast.config import Config
from kinecast.model import build_model
from kinecast.model.keypoints import (draw_blobs, expected_xy, heat_map_shape, pixel_grid, spatial_softmax,
                                      window_expected_xy)
from kinecast.model.latent_ode import fd_velocity
from kinecast.model.staged import dynamics_terms


def _gauss_logits(n, cx, cy, sigma):
    g = (2 * np.arange(n) + 1) / n - 1  # pixel centres in [-1, 1]
    X, Y = np.meshgrid(g, g)
    return -((X - cx) ** 2 + (Y - cy) ** 2) / (2 * sigma ** 2)


@pytest.mark.parametrize("cx,cy", [(0.0, 0.0), (0.31, -0.42), (-0.55, 0.2)])
def test_spatial_softmax_finds_the_centre_of_a_gaussian(cx, cy):
    logits = torch.tensor(_gauss_logits(64, cx, cy, 0.08), dtype=torch.float64)[None, None]
    xy = spatial_softmax(logits)[0, 0]
    assert float(xy[0]) == pytest.approx(cx, abs=1e-6)
    assert float(xy[1]) == pytest.approx(cy, abs=1e-6)


@pytest.mark.parametrize("cx,cy", [(0.31, -0.42), (-0.4, 0.27)])
def test_a_window_read_ignores_a_far_bump(cx, cy):
    n, sigma, weak = 32, 2 / 32, 0.3  # bumps one cell wide; the second has 0.3 of the first's mass
    main = np.exp(_gauss_logits(n, cx, cy, sigma))
    far = weak * np.exp(_gauss_logits(n, -cx, -cy, sigma))
    p = torch.tensor(main + far, dtype=torch.float64)[None, None]
    p = p / p.sum()
    inside = window_expected_xy(p, 4)[0, 0].numpy()
    np.testing.assert_allclose(inside, [cx, cy], atol=1e-3 * 2 / n)
    whole = expected_xy(p)[0, 0].numpy()  # the mass-weighted mean of the two centres
    np.testing.assert_allclose(whole, np.array([cx, cy]) * (1 - weak) / (1 + weak), atol=1e-6)
    assert torch.equal(window_expected_xy(p, 0), expected_xy(p))
    p.requires_grad_(True)
    window_expected_xy(p, 4).sum().backward()
    assert float(p.grad[0, 0][np.exp(_gauss_logits(n, -cx, -cy, sigma)) > 0.5].abs().max()) == 0.0  # far bump: no pull


def test_blobs_are_gaussians_at_the_points():
    pts = torch.tensor([[[0.25, -0.5]]], dtype=torch.float64)
    maps = draw_blobs(pts, 32, 0.1)[0, 0].numpy()
    expected = np.exp(_gauss_logits(32, 0.25, -0.5, 0.1))
    np.testing.assert_allclose(maps, expected, rtol=1e-12, atol=1e-12)
    assert pixel_grid(2).tolist() == [-0.5, 0.5]


def test_keypoint_latent_is_image_coordinates():
    cfg = Config()
    cfg.data.size = 32
    model = build_model(cfg, 1)
    s_mean, _, v_mean, _ = model.encode_dist(torch.rand(2, 3, 1, 32, 32))
    assert s_mean.shape == (2, 2 * cfg.model.keypoints) == v_mean.shape
    assert (s_mean.abs() <= 1).all()  # expected pixel coordinates stay inside the frame


def test_fd_velocity_is_exact_for_a_quadratic_on_uneven_steps():
    t = torch.tensor([0.0, 0.1, 0.25], dtype=torch.float64)
    m = (3.0 + 2.0 * t - 4.0 * t ** 2)[None, :, None]  # velocity at 0 is 2
    assert float(fd_velocity(m, t)[0, 0]) == pytest.approx(2.0, abs=1e-12)
    even = torch.tensor([0.0, 0.1, 0.2], dtype=torch.float64)
    f = torch.sin(even)[None, :, None]
    assert float(fd_velocity(f, even)[0, 0]) == pytest.approx(
        float((-3 * f[0, 0] + 4 * f[0, 1] - f[0, 2]) / 0.2), abs=1e-12)


@pytest.mark.parametrize("per_keypoint", ["off", "on"])
def test_dynamics_stage_recovers_an_oscillator_period(per_keypoint):
    torch.manual_seed(0)
    cfg = Config()
    cfg.data.size = 16
    cfg.model.keypoints = 1
    cfg.model.enc_channels = cfg.model.dec_channels = 8
    cfg.model.hidden = 32
    cfg.model.field_per_keypoint = per_keypoint
    model = build_model(cfg, 1)
    omega = math.pi  # period 2 model units = 20 frames at 0.1 units per frame
    t = torch.arange(40) * 0.1
    opt = torch.optim.Adam(list(model.field.parameters()) + list(model.vel_enc.parameters()), lr=1e-2)
    ctx = torch.zeros(8, 3, 1, 16, 16)
    for step in range(400):
        amp = 0.3 + 0.5 * torch.rand(8, 1, 1)
        phase = torch.zeros(8, 1, 1)
        x = amp * torch.cos(omega * t[None, :, None] + phase)
        target = torch.cat([x, torch.zeros_like(x)], dim=2)  # y stays at 0
        var = torch.full_like(target, 1e-4)
        terms = dynamics_terms(model, ctx, t, target, var, torch.ones(8, 40, dtype=torch.bool), 4000,
                               1.0, 1.0)
        opt.zero_grad()
        terms["loss"].backward()
        opt.step()
    long_t = torch.arange(100) * 0.1
    with torch.no_grad():
        s = model.integrate(torch.tensor([[0.6, 0.0, 0.0, 0.0]]), long_t)[:, 0, 0].numpy()
    # period from the upward zero crossings (linear interpolation between samples)
    crossings = [long_t[i] - s[i] * 0.1 / (s[i + 1] - s[i]) for i in range(len(s) - 1)
                 if s[i] < 0 <= s[i + 1]]
    period = float(np.mean(np.diff(np.array(crossings, dtype=float))))
    assert period == pytest.approx(2 * math.pi / omega, rel=0.03)


def test_dynamics_loss_beyond_the_robust_threshold_is_huber_s():
    from kinecast.model.staged import huber

    # Huber (1964), the definition: rho(e) = e²/2 for |e| <= d, d|e| - d²/2 beyond; its slope is e
    # inside and ±d outside, so one large error pulls no harder than d
    err = torch.tensor([-5.0, -1.0, 0.0, 0.5, 2.0, 8.0], dtype=torch.float64, requires_grad=True)
    d = 1.5
    expected = [d * 5 - d * d / 2, 0.5, 0.0, 0.125, d * 2 - d * d / 2, d * 8 - d * d / 2]
    rho = huber(err, d)
    assert rho.tolist() == pytest.approx(expected, rel=1e-12)
    rho.sum().backward()
    assert err.grad.tolist() == pytest.approx([-d, -1.0, 0.0, 0.5, d, d], rel=1e-12)
    assert huber(err, 0.0).tolist() == pytest.approx((0.5 * err ** 2).tolist(), rel=1e-12)


def test_keypoint_overlap_is_the_gaussian_kernel_of_pair_distances():
    from kinecast.model.staged import keypoint_overlap

    # closed form: exp(-d² / 2w²) per pair; three points → three pairs
    pts = torch.tensor([[0.0, 0.0, 0.3, 0.4, 0.0, 0.0]])  # pair distances 0.5, 0, 0.5
    w = 0.25
    expected = 1.0 + 2 * math.exp(-0.25 / (2 * w ** 2))
    assert float(keypoint_overlap(pts, w)) == pytest.approx(expected, rel=1e-6)


def test_initial_velocity_starts_as_the_finite_difference_of_the_position_readings():
    # v0 = (−3·s0 + 4·s1 − s2) / 2h from the position encoder's readings of the context frames,
    # plus the velocity encoder's correction, which starts at zero (handbook difference formula)
    torch.manual_seed(0)
    cfg = Config()
    cfg.data.size = 16
    cfg.model.context_velocity = "one_sided"  # the central one: test_model_identities.py
    cfg.model.keypoint_tracking = False  # random frames: keep the encoder's keypoint order
    model = build_model(cfg, 1)
    ctx = torch.rand(2, 3, 1, 16, 16)
    _, _, v_mean, _ = model.encode_dist(ctx, torch.tensor([0.0, 0.1, 0.2]))
    s, _ = model.encode_positions(ctx.flatten(0, 1))
    s = s.view(2, 3, -1)
    torch.testing.assert_close(v_mean, (-3 * s[:, 0] + 4 * s[:, 1] - s[:, 2]) / 0.2)


def _two_blob_frame(n, centres, sigma):
    g = (2 * np.arange(n) + 1) / n - 1
    X, Y = np.meshgrid(g, g)
    img = sum(np.exp(-((X - cx) ** 2 + (Y - cy) ** 2) / (2 * sigma ** 2)) for cx, cy in centres)
    return torch.tensor(img, dtype=torch.float32)


def test_foreground_weights_ignore_a_global_lighting_change_and_noise():
    from kinecast.model.staged import foreground_weights

    gen = torch.Generator().manual_seed(0)
    bg = torch.full((1, 32, 32), 0.3)
    still = bg + 0.05 + 0.005 * torch.randn(1, 32, 32, generator=gen)  # brighter, noisy, no object
    assert float(foreground_weights(still[None], bg, 16).sum()) < 0.05
    obj = bg + 0.6 * _two_blob_frame(32, [(0.4, -0.3)], 0.08)[None] + 0.05
    w = foreground_weights(obj[None], bg, 16)[0]
    g = pixel_grid(16)
    # within 3σ of the blob plus one cell of the 16-cell grid (2/16: area pooling spreads an edge)
    near = ((g[None, :] - 0.4) ** 2 + (g[:, None] + 0.3) ** 2) < (3 * 0.08 + 2 / 16) ** 2
    assert float(w.sum()) == pytest.approx(1.0, abs=1e-5)
    assert float(w[near].sum()) > 0.98


def test_coverage_pulls_a_keypoint_onto_each_object():
    from kinecast.model.staged import foreground_weights, keypoint_coverage

    centres = [(-0.5, -0.4), (0.45, 0.35)]
    bg = torch.zeros(1, 64, 64)
    frame = _two_blob_frame(64, centres, 0.06)[None]
    w = foreground_weights(frame[None], bg, 32)
    pts = torch.tensor([[-0.48, -0.40, -0.52, -0.41]], requires_grad=True)  # both on the first blob
    opt = torch.optim.Adam([pts], lr=0.02)
    for _ in range(400):
        opt.zero_grad()
        keypoint_coverage(pts, w, 0.12).backward()
        opt.step()
    found = sorted(pts.detach().view(2, 2).tolist())
    # each keypoint at its blob's centre to within half a pixel of the 64 px frame (1/64 units)
    for (x, y), (cx, cy) in zip(found, sorted(centres)):
        assert abs(x - cx) < 1 / 64 and abs(y - cy) < 1 / 64


def test_shared_field_swaps_accelerations_with_the_objects():
    from kinecast.model.field import DynamicsField

    torch.manual_seed(0)
    f = DynamicsField(6, 16, 2, True, True, 1.0, -2.0, group=2)
    y = torch.randn(4, 12)
    perm = [2, 3, 0, 1, 4, 5]  # swap objects 1 and 2 (x, y of each)
    y_swapped = torch.cat([y[:, :6][:, perm], y[:, 6:][:, perm]], dim=1)
    w = f.sample(4, generator=torch.Generator().manual_seed(1))
    a = f(torch.tensor(0.0), y, w)[:, 6:]
    a_swapped = f(torch.tensor(0.0), y_swapped, w)[:, 6:]
    torch.testing.assert_close(a_swapped, a[:, perm])
    torch.testing.assert_close(f(torch.tensor(0.0), y_swapped)[:, 6:], f(torch.tensor(0.0), y)[:, 6:][:, perm])


def test_without_the_correction_v0_is_exactly_the_finite_difference():
    # model.velocity_correction = false: v0 = (−3·s0 + 4·s1 − s2) / 2h whatever the velocity
    # encoder's weights (handbook difference formula); the encoder then gives only the spread
    torch.manual_seed(0)
    cfg = Config()
    cfg.data.size = 16
    cfg.model.velocity_correction = False
    cfg.model.context_velocity = "one_sided"
    cfg.model.keypoint_tracking = False
    model = build_model(cfg, 1)
    with torch.no_grad():
        model.vel_enc.head.weight.normal_()
        model.vel_enc.head.bias.normal_()
    ctx = torch.rand(2, 3, 1, 16, 16)
    _, _, v_mean, v_logvar = model.encode_dist(ctx, torch.tensor([0.0, 0.1, 0.2]))
    s, _ = model.encode_positions(ctx.flatten(0, 1))
    s = s.view(2, 3, -1)
    torch.testing.assert_close(v_mean, (-3 * s[:, 0] + 4 * s[:, 1] - s[:, 2]) / 0.2)
    assert torch.isfinite(v_logvar).all()


def test_a_log_variance_past_its_bound_can_come_back():
    # value: the clamp to [LOGVAR_MIN, LOGVAR_MAX]; gradient: that of the identity (the straight-through
    # estimator, Bengio, Léonard and Courville 2013), so a loss that wants a smaller variance can
    # still lower a log-variance that went past the top
    from kinecast.model.convnets import LOGVAR_MAX, LOGVAR_MIN, bounded_logvar

    x = torch.tensor([LOGVAR_MIN - 3.0, 0.5, LOGVAR_MAX + 4.0], requires_grad=True)
    y = bounded_logvar(x)
    torch.testing.assert_close(y.detach(), x.detach().clamp(LOGVAR_MIN, LOGVAR_MAX))
    y.sum().backward()
    torch.testing.assert_close(x.grad, torch.ones(3))


def test_heat_map_shape_is_the_gaussian_kl_and_pulls_a_saturated_map_open():
    # Closed form (handbook): KL(N(m, a²) ‖ N(m, b²)) = ln(b/a) + a²/(2b²) − 1/2 per dimension. A
    # map that is a Gaussian of std 2 cells against the term's one-cell bump, on a grid fine enough
    # for sums to stand for integrals: 2·(ln 2 + 1/8 − 1/2) nats.
    n = 48
    g = draw_blobs(torch.tensor([[[0.03, -0.05]]], dtype=torch.float64), n, 2 * 2.0 / n)
    log_p = torch.log(g / g.sum())
    assert float(heat_map_shape(log_p)) == pytest.approx(2 * (math.log(2) + 1 / 8 - 1 / 2), rel=1e-3)
    # A map saturated on one cell: the softmax's expected position has no gradient left (the map
    # cannot move off the cell centre), the shape term's gradient on the logits has (it widens the map).
    logits = torch.full((1, 1, 16, 16), -40.0)
    logits[0, 0, 5, 9] = 40.0
    logits.requires_grad_(True)
    spatial_softmax(logits).sum().backward()
    assert float(logits.grad.abs().max()) < 1e-20
    logits.grad = None
    heat_map_shape(torch.log_softmax(logits.flatten(2), -1).view_as(logits)).backward()
    assert float(logits.grad[0, 0, 5, 10]) < -0.05 and float(logits.grad[0, 0, 5, 9]) > 0.5
