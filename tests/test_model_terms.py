"""The ELBO's pieces: Gaussian KLs, pixel likelihoods, their assembly, the mask and the background.

Sources: torch.distributions (kl_divergence, Bernoulli/Normal log_prob) as the reference library
for the closed-form KL and the likelihoods; scikit-image's mean_squared_error for the frame MSE; the
ELBO of a latent ODE VAE (sum of log-likelihoods minus the KL terms; Kingma & Welling 2014) for the
assembly.
"""

from __future__ import annotations

import pytest
import torch
from skimage.metrics import mean_squared_error
from torch.distributions import Bernoulli, Normal, kl_divergence

from kinecast.config import Config
from kinecast.model import build_model
from kinecast.model.field import DynamicsField
from kinecast.model.gauss import bernoulli_nll, gaussian_nll, kl_normal_prior, kl_std_normal
from kinecast.model.latent_ode import BG_EPS

torch.set_num_threads(1)


def _small_cfg(**model):
    cfg = Config()
    cfg.data.size = 16
    cfg.model.enc_channels = cfg.model.dec_channels = 8
    cfg.model.hidden = 16
    cfg.model.latent_dim = 3
    cfg.model.encoder = "dense"
    for k, v in model.items():
        setattr(cfg.model, k, v)
    return cfg


def test_latent_kl_matches_torch_distributions():
    # Source: torch.distributions.kl_divergence(Normal, Normal) (reference library).
    g = torch.Generator().manual_seed(0)
    mean, logvar = torch.randn(5, 4, generator=g) * 2, torch.randn(5, 4, generator=g)
    ref = kl_divergence(Normal(mean, (0.5 * logvar).exp()), Normal(0.0, 1.0))
    torch.testing.assert_close(kl_std_normal(mean, logvar), ref)


def test_weight_kl_matches_torch_distributions():
    # Source: torch.distributions.kl_divergence against a N(0, prior_std²) prior (reference library).
    g = torch.Generator().manual_seed(1)
    mu, logstd = torch.randn(6, 3, generator=g), torch.randn(6, 3, generator=g) - 2
    for prior_std in (1.0, 0.3):
        ref = kl_divergence(Normal(mu, logstd.exp()), Normal(0.0, prior_std))
        torch.testing.assert_close(kl_normal_prior(mu, logstd, prior_std), ref)


def test_field_kl_sums_every_weight_and_bias():
    # Source: torch.distributions.kl_divergence summed over all mean-field factors (reference library).
    field = DynamicsField(3, 8, 2, True, True, prior_std=0.5, init_logstd=-3.0)
    with torch.no_grad():
        for p in field.w_logstd:
            p.add_(torch.rand_like(p))
    ref = sum(kl_divergence(Normal(m, ls.exp()), Normal(0.0, 0.5)).sum()
              for m, ls in zip(list(field.w_mu) + list(field.b_mu),
                               list(field.w_logstd) + list(field.b_logstd)))
    torch.testing.assert_close(field.kl(), ref)
    assert float(DynamicsField(3, 8, 2, True, False, 0.5, -3.0).kl()) == 0.0


def test_likelihoods_match_torch_distributions():
    # Source: Bernoulli(logits).log_prob and Normal.log_prob (reference library); soft targets in
    # [0, 1] follow the cross-entropy −[x log p + (1 − x) log(1 − p)] (definition).
    g = torch.Generator().manual_seed(2)
    logits = torch.randn(4, 8, generator=g) * 3
    binary = (torch.rand(4, 8, generator=g) > 0.5).float()
    torch.testing.assert_close(bernoulli_nll(logits, binary), -Bernoulli(logits=logits).log_prob(binary))
    soft = torch.rand(4, 8, generator=g)
    p, sd = torch.sigmoid(logits.double()), soft.double()  # reference in float64
    torch.testing.assert_close(bernoulli_nll(logits, soft).double(),
                               -(sd * p.log() + (1 - sd) * (1 - p).log()), rtol=1e-5, atol=1e-6)
    mean, logstd = torch.rand(4, 8, generator=g), torch.full((1, 8), -2.0)
    torch.testing.assert_close(gaussian_nll(mean, soft, logstd),
                               -Normal(mean, logstd.exp()).log_prob(soft))


def test_elbo_assembly_per_pixel():
    # Source: negative ELBO = −Σ_t log p(x_t|s_t) + KL(s0) + KL(v0) + (T/N_total)·KL(W), here per pixel,
    # recomputed with torch.distributions from the model's own encoder outputs and reconstruction.
    torch.manual_seed(0)
    for likelihood, encoder in (("bernoulli", "dense"), ("gaussian", "dense"), ("bernoulli", "keypoints")):
        m = build_model(_small_cfg(likelihood=likelihood, agreement_weight=0.5, encoder=encoder), 1)
        q = m.q
        x = torch.rand(2, 5, 1, 16, 16)
        t = torch.linspace(0, 0.4, 5)
        out = m(x, t, n_total_frames=50, beta=0.3, sample=False)
        s_mean, s_logvar, v_mean, v_logvar = m.encode_dist(x)
        pix = 5 * 16 * 16
        _, latents = m.rollout(x, t)  # the same means and mean weights, through the rollout path
        logits = m.decode_logits(latents[0, ..., :q])
        torch.testing.assert_close(torch.sigmoid(logits), out["recon"])
        if likelihood == "bernoulli":
            nll = -Bernoulli(logits=logits, validate_args=False).log_prob(x).sum() / 2 / pix
        else:
            nll = -Normal(out["recon"], m.log_noise.exp().view(1, 1, -1, 1, 1)).log_prob(x).sum() / 2 / pix
        kl_s = kl_divergence(Normal(s_mean, (0.5 * s_logvar).exp()), Normal(0.0, 1.0)).sum() / 2 / pix
        kl_v = kl_divergence(Normal(v_mean, (0.5 * v_logvar).exp()), Normal(0.0, 1.0)).sum() / 2 / pix
        kl_w = m.field.kl() * 5 / 50 / pix
        torch.testing.assert_close(out["nll"], nll)
        torch.testing.assert_close(out["kl_s0"], kl_s)
        torch.testing.assert_close(out["kl_v0"], kl_v)
        torch.testing.assert_close(out["kl_w"], kl_w)
        # agreement: −log N(encoder mean on frames 1.. | s_t, I) up to a constant, per pixel
        enc_mean, _ = m.encode_positions(x[:, 1:].reshape(-1, 1, 16, 16))
        s_later = latents[0, :, 1:, :q].reshape(-1, q)
        agreement = -Normal(s_later, 1.0).log_prob(enc_mean).sum() / 2 / pix \
            - 0.5 * torch.log(torch.tensor(2 * torch.pi)) * enc_mean.numel() / 2 / pix
        assert float(out["agreement"]) > 0
        torch.testing.assert_close(out["agreement"], agreement)
        torch.testing.assert_close(out["loss"], out["nll"] + 0.3 * (kl_s + kl_v + kl_w)
                                   + 0.5 * out["agreement"])
        # the frame MSE against scikit-image's mean_squared_error (reference library), in float64
        ref_mse = mean_squared_error(x.double().numpy(), out["recon"].detach().double().numpy())
        assert float(out["mse"]) == pytest.approx(ref_mse, rel=1e-5)


def test_mask_removes_dropped_frames_from_the_likelihood():
    # Source: the likelihood of a missing observation is absent from the ELBO (definition).
    torch.manual_seed(1)
    m = build_model(_small_cfg(agreement_weight=1.0), 1)
    x = torch.rand(2, 5, 1, 16, 16)
    t = torch.linspace(0, 0.4, 5)
    mask = torch.ones(2, 5, dtype=torch.bool)
    mask[:, 3] = False
    a = m(x, t, 20, sample=False, mask=mask)
    y = x.clone()
    y[:, 3] = torch.rand(2, 1, 16, 16)  # whatever sits in a dropped slot must not matter
    b = m(y, t, 20, sample=False, mask=mask)
    c = m(y, t, 20, sample=False)
    for key in ("loss", "nll", "mse", "agreement"):
        torch.testing.assert_close(a[key], b[key])
    # the masked MSE is scikit-image's mean_squared_error over the present frames only
    keep = mask[0].numpy()
    ref_mse = mean_squared_error(x[:, keep].double().numpy(), a["recon"][:, keep].detach().double().numpy())
    assert float(a["mse"]) == pytest.approx(ref_mse, rel=1e-5)
    assert abs(float(c["loss"].detach()) - float(b["loss"].detach())) > 1e-6
    full = m(x, t, 20, sample=False, mask=torch.ones(2, 5, dtype=torch.bool))
    torch.testing.assert_close(full["loss"], m(x, t, 20, sample=False)["loss"])


def test_zero_residual_reproduces_the_background():
    # Source: sigmoid(logit(b)) = b (definition of the logistic function and its inverse).
    m = build_model(_small_cfg(), 3)
    bg = torch.rand(3, 16, 16) * 0.9 + 0.05
    bg[0, 0, 0], bg[1, 0, 0] = 0.0, 1.0  # extremes are clamped into [eps, 1 − eps]
    m.set_background(bg)
    with torch.no_grad():
        m.decoder.out.weight.zero_()
        m.decoder.out.bias.zero_()
    out = m.decode(torch.randn(4, 3))
    expect = bg.clamp(BG_EPS, 1 - BG_EPS).expand(4, 3, 16, 16)
    torch.testing.assert_close(out, expect, rtol=0, atol=1e-6)
    m.set_background(None)
    torch.testing.assert_close(m.decode(torch.randn(2, 3)), torch.full((2, 3, 16, 16), 0.5))
    assert "background" in m.state_dict()


def test_kl_weight_scales_with_window_share():
    # Source: the weight KL is shared over the data set: a window of T of N frames carries T/N of it.
    m = build_model(_small_cfg(), 1)
    x, t = torch.rand(1, 4, 1, 16, 16), torch.linspace(0, 0.3, 4)
    a = m(x, t, 40, sample=False)["kl_w"]
    b = m(x, t, 80, sample=False)["kl_w"]
    assert float(a) > 0
    torch.testing.assert_close(a, 2 * b)
    det = build_model(_small_cfg(variant="deterministic"), 1)
    assert float(det(x, t, 40)["kl_w"]) == 0.0
