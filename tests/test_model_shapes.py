"""Shapes, gradient flow, variants and rollout behaviour of the latent ODE model.

Sources: the API contract in the model brief (shapes); backpropagation reaches every parameter that
the loss depends on (common practice check); uniqueness of ODE solutions, so integrating forward by
Δ and then backward by Δ returns the start (Picard–Lindelöf; common textbook fact) up to RK4 error.
"""

from __future__ import annotations

from dataclasses import replace

import pytest
import torch

from kinecast.config import Config
from kinecast.model import build_model

torch.set_num_threads(1)


def _cfg(size=32, **model):
    cfg = Config()
    cfg.data.size = size
    cfg.model.enc_channels = cfg.model.dec_channels = 8
    cfg.model.hidden = 16
    for k, v in model.items():
        setattr(cfg.model, k, v)
    return cfg


@pytest.mark.parametrize("size", [32, 64, 128])
@pytest.mark.parametrize("channels", [1, 3])
def test_forward_and_rollout_shapes(size, channels):
    # Source: API contract (frames [B,T,C,H,W] → recon of the same shape; rollout [S,B,N,C,H,W]).
    m = build_model(_cfg(size), channels)
    x = torch.rand(2, 4, channels, size, size)
    out = m(x, torch.linspace(0, 0.3, 4), n_total_frames=40)
    assert out["recon"].shape == x.shape
    for key in ("loss", "nll", "kl_s0", "kl_v0", "kl_w", "agreement", "mse"):
        assert out[key].ndim == 0 and torch.isfinite(out[key]), key
    assert out["recon"].min() >= 0 and out["recon"].max() <= 1
    assert m.encode(x[:, :3], sample=True).shape == (2, 2 * m.q)
    with torch.no_grad():
        frames, latents = m.rollout(x[:, :3], torch.tensor([0.0, 0.1, 0.25]), samples=2)
    assert frames.shape == (2, 2, 3, channels, size, size)
    assert latents.shape == (2, 2, 3, 2 * m.q)
    assert m.decode(torch.zeros(5, 7, m.q)).shape == (5, 7, channels, size, size)


def test_odd_frame_size_decodes_at_that_size():
    # Source: API contract (any cfg.data.size, not only powers of two).
    m = build_model(_cfg(48), 1)
    out = m(torch.rand(1, 3, 1, 48, 48), torch.tensor([0.0, 0.1, 0.2]), 10)
    assert out["recon"].shape == (1, 3, 1, 48, 48)


@pytest.mark.parametrize("variant", ["second_order", "first_order", "deterministic"])
@pytest.mark.parametrize("likelihood", ["bernoulli", "gaussian"])
def test_gradients_reach_every_parameter(variant, likelihood):
    # Source: common practice check — after one backward pass every trainable parameter has a
    # finite, non-None gradient, and most are non-zero.
    torch.manual_seed(0)
    m = build_model(_cfg(32, variant=variant, likelihood=likelihood, agreement_weight=0.1), 1)
    m.set_background(torch.rand(1, 32, 32))
    out = m(torch.rand(2, 5, 1, 32, 32), torch.tensor([0.0, 0.1, 0.2, 0.35, 0.4]), 50)
    out["loss"].backward()
    named = list(m.named_parameters())
    for name, p in named:
        assert p.grad is not None, name
        assert torch.isfinite(p.grad).all(), name
    # The keypoint heat maps' 1x1-conv bias adds one constant per map before a spatial softmax, and
    # softmax(x + c) = softmax(x) (closed form), so its gradient is zero in exact arithmetic: only
    # rounding noise is left. Every other parameter must get a real gradient, judged against the
    # largest gradient of its own network (the field's weight-KL gradients dwarf an encoder's).
    def net(name):
        return name.split(".")[0]
    scale = {}
    for name, p in named:
        scale[net(name)] = max(scale.get(net(name), 0.0), float(p.grad.abs().max()))
    dead = {"pos_enc.heat.bias"}
    for name, p in named:
        if name in dead:
            assert float(p.grad.abs().max()) < 1e-6 * scale[net(name)], name
        else:
            assert float(p.grad.abs().max()) > 1e-9 * scale[net(name)], name
    has_logstd = any("logstd" in n for n, _ in named)
    assert has_logstd == (variant != "deterministic")
    assert (m.log_noise is not None) == (likelihood == "gaussian")


@pytest.mark.parametrize("variant", ["second_order", "first_order", "deterministic"])
@pytest.mark.parametrize("likelihood", ["bernoulli", "gaussian"])
def test_gradients_match_central_differences(variant, likelihood):
    # Source: central finite differences, (f(θ + h·d) − f(θ − h·d)) / 2h = ∇f·d + O(h²) (numerical
    # differentiation, any numerical-analysis text; the same check torch.autograd.gradcheck makes),
    # in float64 on the deterministic forward pass, for each parameter tensor along a random direction.
    # The central context velocity (model.context_velocity) carries v0 back one frame with the field under a deliberate
    # stop-gradient (LatentODE.context_velocity), so this check of the gradients runs with the
    # one-sided difference, which has none.
    torch.manual_seed(0)
    m = build_model(_cfg(16, variant=variant, likelihood=likelihood, agreement_weight=0.1,
                         context_velocity="one_sided"), 1).double()
    m.set_background(torch.rand(1, 16, 16, dtype=torch.float64))
    x = torch.rand(2, 5, 1, 16, 16, dtype=torch.float64)
    t = torch.tensor([0.0, 0.1, 0.2, 0.35, 0.4], dtype=torch.float64)

    def loss():
        return m(x, t, 50, beta=0.5, sample=False)["loss"]

    params = [p for p in m.parameters() if p.requires_grad]
    grads = torch.autograd.grad(loss(), params)
    gen, h = torch.Generator().manual_seed(1), 1e-5
    largest = 0.0
    for p, g in zip(params, grads):
        d = torch.randn(p.shape, generator=gen, dtype=torch.float64)
        with torch.no_grad():
            p.add_(h * d)
            up = float(loss())
            p.sub_(2 * h * d)
            down = float(loss())
            p.add_(h * d)
        fd, an = (up - down) / (2 * h), float((g * d).sum())
        # rounding of the loss (|loss| ~ 10 at most here) over 2h bounds the absolute error (1e-8)
        assert abs(fd - an) <= 1e-8 + 1e-4 * abs(an), (fd, an)
        largest = max(largest, abs(an))
    assert largest > 1e-4  # the loss does move: the comparisons above are not all 0 == 0


def test_gradients_with_adjoint_solver():
    # Source: as above, with adjoint gradients through drawn weights.
    torch.manual_seed(0)
    cfg = _cfg(32)
    cfg.solver = replace(cfg.solver, adjoint=True)
    m = build_model(cfg, 1)
    m(torch.rand(2, 4, 1, 32, 32), torch.tensor([0.0, 0.1, 0.2, 0.3]), 40)["loss"].backward()
    for name, p in m.named_parameters():
        assert p.grad is not None and torch.isfinite(p.grad).all(), name
    assert float(m.field.w_logstd[0].grad.abs().max()) > 0


def test_first_order_variant_state_and_decoder():
    # Source: variant definition — z of size 2q, the decoder reads the first q entries.
    m = build_model(_cfg(32, variant="first_order"), 1)
    assert not m.field.second_order
    ctx = torch.rand(1, 3, 1, 32, 32)
    with torch.no_grad():
        frames, latents = m.rollout(ctx, torch.tensor([0.0, 0.2]))
        torch.testing.assert_close(frames, m.decode(latents[..., :m.q]))
        z0 = m.encode(ctx, sample=False)
        dz = m.field(torch.tensor(0.0), z0)
    assert latents.shape[-1] == 2 * m.q
    assert not torch.allclose(dz[:, :m.q], z0[:, m.q:])  # not the second-order ds/dt = v form


def test_rollout_backward_times_any_order_and_repeats():
    # Source: API contract (times may be negative, unsorted, repeated) and solution uniqueness.
    torch.manual_seed(1)
    m = build_model(_cfg(32), 1)
    ctx = torch.rand(2, 3, 1, 32, 32)
    with torch.no_grad():
        _, ref = m.rollout(ctx, torch.tensor([-0.3, -0.1, 0.0, 0.2]))
        _, mixed = m.rollout(ctx, torch.tensor([0.2, -0.1, 0.0, -0.3, 0.2]))
        z0 = m.encode(ctx, sample=False)
    torch.testing.assert_close(ref[0, :, 2], z0, rtol=0, atol=0)
    order = [3, 1, 2, 0, 3]
    torch.testing.assert_close(mixed, ref[:, :, order], rtol=0, atol=0)
    assert not torch.allclose(ref[0, :, 0], ref[0, :, 2])


def test_backward_integration_inverts_forward():
    # Source: uniqueness of ODE solutions (Picard–Lindelöf): the backward flow undoes the forward flow.
    torch.manual_seed(2)
    # a smooth (tanh) field: RK4's O(h⁴) error bound needs a smooth right-hand side, and a ReLU
    # field's kinks leave ~1e-4 here
    cfg = _cfg(32, field_activation="tanh")
    cfg.solver = replace(cfg.solver, substeps=16)
    m = build_model(cfg, 1).double()
    with torch.no_grad():
        m.field.w_mu[-1].mul_(20.0)  # a strong field so the check is not trivial
        w = m.field.sample(3)
        z0 = torch.randn(3, 2 * m.q, dtype=torch.float64)
        fwd = m.integrate(z0, torch.tensor([0.0, 0.7], dtype=torch.float64), w)[-1]
        back = m.integrate(fwd, torch.tensor([0.0, -0.7], dtype=torch.float64), w)[-1]
    assert float((fwd - z0).abs().max()) > 0.1
    torch.testing.assert_close(back, z0, rtol=0, atol=1e-7)


def test_samples_spread_only_when_asked():
    # Source: API contract — mean weights + mean initial state give identical futures; drawn weights
    # (with a wide posterior) or a drawn initial state give different ones; a seeded generator repeats.
    torch.manual_seed(3)
    m = build_model(_cfg(32, init_logstd=-0.5), 1)
    ctx = torch.rand(1, 3, 1, 32, 32)
    t = torch.tensor([0.0, 0.5, 1.0])
    with torch.no_grad():
        _, same = m.rollout(ctx, t, samples=3)
        _, wdraw = m.rollout(ctx, t, samples=3, mean_weights=False)
        _, idraw = m.rollout(ctx, t, samples=3, sample_init=True)
        a, _ = m.rollout(ctx, t, samples=2, mean_weights=False, generator=torch.Generator().manual_seed(5))
        b, _ = m.rollout(ctx, t, samples=2, mean_weights=False, generator=torch.Generator().manual_seed(5))
    assert torch.equal(same[0], same[1]) and torch.equal(same[1], same[2])
    assert not torch.allclose(wdraw[0, :, -1], wdraw[1, :, -1])
    torch.testing.assert_close(wdraw[:, :, 0], same[:, :, 0])  # weights act only after t = 0
    assert not torch.allclose(idraw[0, :, 0], idraw[1, :, 0])
    assert torch.equal(a, b)


def test_bad_inputs_raise_clear_errors():
    # Source: API contract — wrong shapes are refused with a message naming the expected shape.
    m = build_model(_cfg(32), 1)
    with pytest.raises(ValueError, match=r"expected \[B, T>=3, 1, 32, 32\]"):
        m(torch.rand(2, 4, 3, 32, 32), torch.linspace(0, 0.3, 4), 10)
    with pytest.raises(ValueError, match="expected"):
        m.encode(torch.rand(2, 2, 1, 32, 32), sample=False)
    with pytest.raises(ValueError, match="t must have shape"):
        m(torch.rand(2, 4, 1, 32, 32), torch.linspace(0, 0.3, 5), 10)
    with pytest.raises(ValueError, match="strictly increasing"):
        m(torch.rand(2, 4, 1, 32, 32), torch.tensor([0.0, 0.2, 0.1, 0.3]), 10)
    with pytest.raises(ValueError, match="set_background"):
        m.set_background(torch.rand(3, 32, 32))
    with pytest.raises(ValueError, match="samples"):
        m.rollout(torch.rand(1, 3, 1, 32, 32), torch.tensor([0.0]), samples=0)


def test_chunked_decoding_matches_one_pass(monkeypatch):
    # Source: API contract — decoding in chunks is an implementation detail; results are identical.
    import kinecast.model.latent_ode as lo

    m = build_model(_cfg(32), 1)
    s = torch.randn(3, 7, m.q)
    with torch.no_grad():
        whole = m.decode(s)
        monkeypatch.setattr(lo, "DECODE_CHUNK", 4)
        chunked = m.decode(s)
    assert chunked.shape == (3, 7, 1, 32, 32)
    torch.testing.assert_close(chunked, whole)
