"""The second-order latent ODE VAE: encoders, latent dynamics, decoder over a static background, ELBO.

Generative story for a window of frames x_0..x_{T-1} at model times t_0 = 0 < t_1 < ... :
s0 ~ N(0, I), v0 ~ N(0, I), W ~ p(W); (s, v) solves ds/dt = v, dv/dt = f_W(s, v); x_i ~ p(x | s(t_i)).
The position encoder reads x_0 and gives q(s0); the velocity encoder reads the first k frames and
their differences and gives q(v0); q(W) is a mean-field Gaussian.

Mean frame: ``sigmoid(logit(b) + decoder(s))`` with b the background buffer (clamped to
[:data:`BG_EPS`, 1 − :data:`BG_EPS`]). A zero residual reproduces b up to float rounding, and the
Bernoulli likelihood works on logits directly. Without a background b = 0.5 (logit 0).

References
----------
Rubanova, Y., Chen, R. T. Q. and Duvenaud, D. (2019). Latent ODEs for irregularly-sampled time
series. NeurIPS.
"""

from __future__ import annotations

import math

import torch
from torch import nn

from .convnets import Decoder, GaussEncoder
from .field import DynamicsField, Weights
from .keypoints import MAX_STD_BLOBS, KeypointDecoder, KeypointEncoder
from .gauss import bernoulli_nll, gaussian_nll, kl_std_normal
from .identities import follow
from .refine import refine_positions
from . import fused_rk4
from .solver import solve

BG_EPS = 1e-4  # background intensities are clamped into [BG_EPS, 1 - BG_EPS] before the logit
INIT_NOISE_STD = 0.1  # starting pixel noise std of the Gaussian likelihood (intensities in [0, 1])
# Frames decoded at once by decode(): bounds the decoder's working memory. fit's spread calibration
# decodes 16 futures × 60 frames per clip, one piece at 1024, which set a 64 px fit's peak memory.
# Peak RSS of a 5-step default fit on the bench's 1,000 / 10,000-frame recordings: 1.35 / 1.57 GB
# at 1024; 1.08 / 1.22 GB at 256 with frame tracking in blocks (tracks.TRACK_BLOCK). 10 futures ×
# 100 frames decode 2 % slower at 256 (6690 against 6800 frames/s; DEVELOPERS.md, 24th session)
DECODE_CHUNK = 256


def _reparam(mean: torch.Tensor, logvar: torch.Tensor, generator: torch.Generator | None = None):
    eps = torch.randn(mean.shape, generator=generator, device=mean.device, dtype=mean.dtype)
    return mean + (0.5 * logvar).exp() * eps


def initial_state(dist, sample: bool, generator: torch.Generator | None = None) -> torch.Tensor:
    """[s0, v0] [B, 2q] from ``dist`` = (s_mean, s_logvar, v_mean, v_logvar) (``encode_dist``): a
    reparameterised draw of s0 then v0 with ``sample``, else the means."""
    s_mean, s_logvar, v_mean, v_logvar = dist
    if sample:
        return torch.cat([_reparam(s_mean, s_logvar, generator), _reparam(v_mean, v_logvar, generator)], dim=1)
    return torch.cat([s_mean, v_mean], dim=1)


def fd_velocity(m: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
    """Velocity at t[0] from positions m[:, 0..2] at times t[0..2] (second-order one-sided
    difference, a handbook formula; for equal steps h it is (−3·m0 + 4·m1 − m2) / 2h). With only
    two positions, the first-order difference (m1 − m0) / (t1 − t0)."""
    if m.shape[1] < 3 or len(t) < 3:
        return (m[:, 1] - m[:, 0]) / (t[1] - t[0])
    h1, h2 = t[1] - t[0], t[2] - t[1]
    a = -(2 * h1 + h2) / (h1 * (h1 + h2))
    b = (h1 + h2) / (h1 * h2)
    c = -h1 / (h2 * (h1 + h2))
    return a * m[:, 0] + b * m[:, 1] + c * m[:, 2]


def central_velocity(m: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
    """Velocity at t[1] from positions m[:, 0..2] at times t[0..2]: the derivative at the middle
    node of the quadratic through the three (a handbook three-point formula; for equal steps h the
    central difference (m2 − m0) / 2h). Its error term is O(h²) as for :func:`fd_velocity`, but
    read noise of std σ enters it with std σ/(h·√2) instead of σ·√26/(2h), 3.6× less."""
    h1, h2 = t[1] - t[0], t[2] - t[1]
    return (-h2 / (h1 * (h1 + h2)) * m[:, 0] + (h2 - h1) / (h1 * h2) * m[:, 1]
            + h1 / (h2 * (h1 + h2)) * m[:, 2])


class LatentODE(nn.Module):
    """Latent ODE model; build it with :func:`build_model`.

    Parameters
    ----------
    model_cfg : ModelConfig
    solver_cfg : SolverConfig
    channels : int
        1 (grey) or 3 (RGB).
    size : int
        Frame height and width in pixels.
    """

    def __init__(self, model_cfg, solver_cfg, channels: int, size: int):
        super().__init__()
        if channels < 1 or size < 2:
            raise ValueError(f"LatentODE: need channels >= 1 and size >= 2, got {channels}, {size}")
        self.cfg = model_cfg
        self.solver_cfg = solver_cfg
        self.variant = model_cfg.variant
        self.keypoints = model_cfg.encoder == "keypoints"
        self.tracking = self.keypoints and model_cfg.keypoint_tracking  # see identities.py
        self.refine_steps = int(model_cfg.read_refinement) if self.keypoints else 0  # see refine.py
        self.q = q = latent_size(model_cfg)
        self.k = k = int(model_cfg.velocity_frames)
        self.channels, self.size = int(channels), int(size)
        if self.keypoints:
            self.pos_enc = KeypointEncoder(channels, size, model_cfg.enc_channels, model_cfg.keypoints,
                                           max_std=MAX_STD_BLOBS * model_cfg.blob_std,
                                           window=model_cfg.keypoint_window,
                                           low_trunk=model_cfg.keypoint_trunk_low_precision)
            self.decoder = KeypointDecoder(model_cfg.keypoints, channels, size, model_cfg.dec_channels,
                                           model_cfg.blob_std)
        else:
            self.pos_enc = GaussEncoder(channels, size, model_cfg.enc_channels, q)
            self.decoder = Decoder(q, channels, size, model_cfg.dec_channels)
        # the velocity encoder also reads the position encoder's means of the k context frames
        self.vel_enc = GaussEncoder((2 * k - 1) * channels, size, model_cfg.enc_channels, q, extra_dim=k * q)
        self.velocity_from_positions = model_cfg.velocity_from_positions and self.variant != "first_order"
        self.velocity_correction = model_cfg.velocity_correction
        if self.velocity_from_positions:  # the encoder's mean starts as no correction to the finite difference
            with torch.no_grad():
                self.vel_enc.head.weight[:q].zero_()
                self.vel_enc.head.bias[:q].zero_()
        self.field = DynamicsField(q, model_cfg.hidden, model_cfg.hidden_layers,
                                   second_order=self.variant != "first_order",
                                   bayesian=self.variant != "deterministic",
                                   prior_std=model_cfg.prior_std, init_logstd=model_cfg.init_logstd,
                                   activation=model_cfg.field_activation,
                                   group=2 if (self.keypoints and model_cfg.field_per_keypoint == "on"
                                               and self.variant != "first_order") else 0)
        if model_cfg.likelihood == "gaussian":
            self.log_noise = nn.Parameter(torch.full((channels,), math.log(INIT_NOISE_STD)))
        else:
            self.log_noise = None
        self.register_buffer("background", torch.full((channels, size, size), 0.5))
        # Sampled futures spread about their mean by this factor (fitted on validation trials after
        # training, see kinecast.model.calibration; 1 = the posterior's own spread).
        self.register_buffer("spread_scale", torch.ones(()))
        # Std of the pixel noise that belongs to the predictive distribution of sampled futures (fitted
        # with the spread scale; used by the scores' bands, see calibration.band_inside; 0 = none).
        self.register_buffer("pixel_noise", torch.zeros(()))

    # ----------------------------------------------------------------- background and decoding
    def set_background(self, bg: torch.Tensor | None) -> None:
        """Use ``bg`` ([C, H, W] in [0, 1]) as the static background; None resets to none (0.5)."""
        with torch.no_grad():
            if bg is None:
                self.background.fill_(0.5)
                return
            bg = torch.as_tensor(bg)
            if tuple(bg.shape) != tuple(self.background.shape):
                raise ValueError(f"set_background: expected shape {tuple(self.background.shape)}, "
                                 f"got {tuple(bg.shape)}")
            if not torch.isfinite(bg).all():
                raise ValueError("set_background: background holds non-finite values")
            self.background.copy_(bg.to(self.background))

    def decode_logits(self, s: torch.Tensor) -> torch.Tensor:
        """Latent positions (..., q) → pixel logits (..., C, H, W), background included."""
        base = torch.logit(self.background.clamp(BG_EPS, 1.0 - BG_EPS))
        if self.keypoints:
            return base + self.decoder(s, self.background)
        return base + self.decoder(s)

    def decode(self, s: torch.Tensor) -> torch.Tensor:
        """Latent positions (..., q) → mean frames (..., C, H, W) in [0, 1].

        Large batches are decoded in chunks of :data:`DECODE_CHUNK` frames, so many long sampled
        futures do not need the decoder's activations for every frame at once.
        """
        flat = s.reshape(-1, s.shape[-1])
        if len(flat) <= DECODE_CHUNK:
            return torch.sigmoid(self.decode_logits(s))
        out = torch.cat([torch.sigmoid(self.decode_logits(c)) for c in flat.split(DECODE_CHUNK)])
        return out.view(*s.shape[:-1], *out.shape[1:])

    # ----------------------------------------------------------------------------- encoding
    def _check_frames(self, x: torch.Tensor, name: str, min_t: int) -> None:
        if x.ndim != 5 or x.shape[2:] != (self.channels, self.size, self.size) or x.shape[1] < min_t:
            raise ValueError(f"{name}: expected [B, T>={min_t}, {self.channels}, {self.size}, "
                             f"{self.size}], got {list(x.shape)}")

    def encode_positions(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Means and log-variances of the latent position of each frame ``x`` [N, C, H, W]."""
        if self.keypoints:
            return self.pos_enc(x, self.background)
        return self.pos_enc(x)

    def read_positions(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """As :meth:`encode_positions`, with the means refined by the decoder
        (:func:`~kinecast.model.refine.refine_positions`, ``model.read_refinement`` steps) where no
        gradient is being taken; in training steps the encoder's own reads are used (refining there
        would cost several decoder passes per context frame and step)."""
        mean, logvar = self.encode_positions(x)
        if self.refine_steps and not torch.is_grad_enabled():
            mean = refine_positions(self, mean, x, self.refine_steps, self.cfg.read_refinement_px)
        return mean, logvar

    def encode_dist(self, ctx: torch.Tensor, ctx_t: torch.Tensor | None = None):
        """Means and log-variances of q(s0) and q(v0) from ``ctx`` [B, k, C, H, W] (first k used).

        ``ctx_t`` [k]: model times of the context frames (default: one median frame interval,
        ``solver.units_per_frame``, apart); used by ``model.velocity_from_positions``.
        """
        self._check_frames(ctx, "encode", self.k)
        ctx = ctx[:, :self.k].contiguous()  # convs on broadcast (expanded) views are very slow
        B = ctx.shape[0]
        pos_mean, pos_logvar = self.read_positions(ctx.flatten(0, 1))
        if self.tracking:
            pos_mean, pos_logvar = (x.flatten(0, 1) for x in
                                    follow(pos_mean.view(B, self.k, self.q), pos_logvar.view(B, self.k, self.q)))
        s_mean = pos_mean.reshape(B, self.k, self.q)[:, 0]
        s_logvar = pos_logvar.reshape(B, self.k, self.q)[:, 0]
        stacked = torch.cat([ctx.flatten(1, 2), (ctx[:, 1:] - ctx[:, :-1]).flatten(1, 2)], dim=1)
        v_mean, v_logvar = self.vel_enc(stacked, pos_mean.reshape(B, self.k * self.q))
        if self.velocity_from_positions:
            if ctx_t is None:
                ctx_t = torch.arange(self.k, dtype=ctx.dtype, device=ctx.device) * self.solver_cfg.units_per_frame
            v_fd = self.context_velocity(pos_mean.reshape(B, self.k, self.q), ctx_t[:self.k].to(ctx))
            v_mean = v_mean + v_fd if self.velocity_correction else v_fd
        return s_mean, s_logvar, v_mean, v_logvar

    def context_velocity(self, m: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
        """Velocity at t[0] from the context frames' positions m [B, k, q] at times t [k].

        ``model.context_velocity = "central"`` (second order, k ≥ 3): :func:`central_velocity` at
        t[1], carried back to t[0] by one step of the field's acceleration there (posterior means,
        no gradient into the field): ``v(t0) ≈ v(t1) − (t1 − t0)·a(m1, v(t1))``, a first-order
        Taylor step whose error is O(h²) like the difference's. Else (the default, "one_sided")
        :func:`fd_velocity` at t[0] directly.
        """
        if self.cfg.context_velocity != "central" or not self.field.second_order or m.shape[1] < 3:
            return fd_velocity(m, t)
        v1 = central_velocity(m, t)
        with torch.no_grad():  # a stop-gradient: the field is trained by the rollouts alone, not to
            # bend v0 window by window (which would let it learn the reads' noise)
            accel = self.field(t[1], torch.cat([m[:, 1], v1], dim=1))[:, self.q:]
        return v1 - (t[1] - t[0]) * accel

    def encode(self, ctx: torch.Tensor, sample: bool, generator: torch.Generator | None = None
               ) -> torch.Tensor:
        """Initial latent state [B, 2q] = [s0, v0] at the time of ``ctx[:, 0]``.

        ``sample`` draws from q(s0) q(v0) (reparameterised); otherwise the means are returned.
        """
        return initial_state(self.encode_dist(ctx), sample, generator)

    # ---------------------------------------------------------------------------- dynamics
    def integrate(self, state0: torch.Tensor, t: torch.Tensor, weights: Weights | None = None) -> torch.Tensor:
        """Solve from ``state0`` [n, 2q] at t[0] with the field's ``weights`` (from
        ``field.sample``; None: the posterior means); returns [N, n, 2q].

        Coordinates the field holds still (``field.moving`` = 0) start with zero velocity."""
        if self.field.second_order:
            state0 = torch.cat([state0[:, :self.q], state0[:, self.q:] * self.field.moving], dim=1)
        if fused_rk4.applies(self.field, t, self.solver_cfg, weights):
            return fused_rk4.solve_rk4(self.field, state0, t, self.solver_cfg, weights)
        field = self.field if weights is None else (lambda tt, y: self.field(tt, y, weights))
        return solve(field, state0, t, self.solver_cfg, adjoint_params=self.field.tensors(weights))

    def integrate_any(self, state0: torch.Tensor, t: torch.Tensor, weights: Weights | None = None) -> torch.Tensor:
        """States at arbitrary times ``t`` [N] relative to ``state0`` (time 0): any order, repeats,
        before and after 0. Solves forward for t > 0 and backward for t < 0. Returns [N, n, 2q]."""
        t = torch.as_tensor(t, dtype=state0.dtype).to(state0.device).reshape(-1)
        uniq, inverse = torch.unique(t, sorted=True, return_inverse=True)
        zero = uniq.new_zeros(1)
        parts = []
        neg = uniq[uniq < 0]
        if len(neg):
            back = self.integrate(state0, torch.cat([zero, neg.flip(0)]), weights)[1:]
            parts.append(back.flip(0))
        pos = uniq[uniq >= 0]
        if len(pos):
            fwd = self.integrate(state0, torch.cat([zero, pos[pos > 0]]), weights)
            parts.append(fwd if pos[0] == 0 else fwd[1:])
        return torch.cat(parts, dim=0)[inverse]

    # ------------------------------------------------------------------------------ ELBO
    def forward(self, frames: torch.Tensor, t: torch.Tensor, n_total_frames: int, beta: float = 1.0,
                mask: torch.Tensor | None = None, sample: bool = True, decode_frames: int = 0,
                agreement_frames: int = 0) -> dict:
        """Negative ELBO of a batch of windows, normalised per observed pixel, and its terms.

        Parameters
        ----------
        frames : Tensor [B, T, C, H, W]
            Intensities in [0, 1]; T >= ``velocity_frames``.
        t : Tensor [T]
            Model times of the frames, strictly increasing (made relative to ``t[0]``).
        n_total_frames : int
            Frames in the whole training set; the weight KL is scaled by T / n_total_frames.
        beta : float
            Weight of the KL terms (KL warm-up).
        mask : Tensor [B, T] of bool, optional
            True where a frame is present. Dropped frames get no likelihood or agreement term; the
            first ``velocity_frames`` frames are read by the encoders whatever the mask says.
        sample : bool
            Draw s0, v0 and the weights (training); False uses the means (deterministic score).
        decode_frames : int
            When 0 < decode_frames < T, decode and score only that many frames drawn at random from
            the window (``train.decode_frames``); ``nll`` stays an unbiased estimate and ``recon``
            covers the drawn frames only.
        agreement_frames : int
            When 0 < agreement_frames < the frames after the first, the agreement term reads only
            that many of them, drawn at random (``train.agreement_frames``; an unbiased estimate
            that bounds the position encoder's memory on long windows).

        Returns
        -------
        dict
            ``loss = nll + beta·(kl_s0 + kl_v0 + kl_w) + agreement_weight·agreement`` (0-dim), with
            ``nll`` and the KL terms in nats per observed pixel (per-sequence sums divided by the
            observed pixels per sequence), ``agreement`` the negative log-density (up to a
            constant) of the position encoder's means on the present frames 1.. under N(s_t, I),
            in the same per-pixel units (gradients reach both the encoder and the trajectory),
            ``mse`` the per-pixel squared error of the mean frames (observed frames), and
            ``recon`` the mean frames [B, T, C, H, W]. Only ``loss`` carries gradients; the
            other entries are detached (for logging).
        """
        frames = frames.contiguous()
        B, T = frames.shape[:2]
        t, obs = self._check_batch(frames, t, n_total_frames, mask)
        obs_f = obs.to(frames.dtype)
        n_obs = obs_f.sum().clamp_min(1.0)
        dist, s = self._trajectory(frames, t, sample)
        norm = n_obs / B * float(self.channels * self.size * self.size)  # observed pixels per sequence
        if 0 < decode_frames < T:
            s, frames, obs, obs_f = self._frame_subset(decode_frames, s, frames, obs, obs_f)
        scale = n_obs / obs_f.sum().clamp_min(1.0)
        nll_sum, mse, recon = self._reconstruction(s, frames, obs_f)
        nll = scale * nll_sum / B / norm
        kl_s0, kl_v0, kl_w = self._kl_terms(dist, B, norm, T / float(n_total_frames))
        agreement = self._agreement(frames, s, obs, scale / B / norm, agreement_frames)
        loss = nll + beta * (kl_s0 + kl_v0 + kl_w) + self.cfg.agreement_weight * agreement
        terms = {"nll": nll, "kl_s0": kl_s0, "kl_v0": kl_v0, "kl_w": kl_w, "agreement": agreement,
                 "mse": mse, "recon": recon}
        return {"loss": loss, **{k: v.detach() for k, v in terms.items()}}

    def _trajectory(self, frames: torch.Tensor, t: torch.Tensor, sample: bool) -> tuple[tuple, torch.Tensor]:
        """:meth:`forward`'s latent path: ``(dist, s)`` with ``dist`` the encoder's
        (s_mean, s_logvar, v_mean, v_logvar) and ``s`` [B, T, q] the positions at ``t``.

        With ``sample``, draws s0 then v0 (:func:`initial_state`) and then the field's weights, in
        that order from the global random stream; otherwise uses the means."""
        dist = self.encode_dist(frames, t[:self.k] - t[0])
        state0 = initial_state(dist, sample)
        weights = self.field.sample(frames.shape[0], mean=not sample)
        states = self.integrate(state0, t - t[0], weights).transpose(0, 1)  # [B, T, 2q]
        return dist, states[..., :self.q]

    @staticmethod
    def _frame_subset(count: int, *per_frame: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """``count`` of the window's frames drawn at random (kept in time order), taken from each
        tensor of ``per_frame`` [B, T, ...] alike.

        Decoding a random subset gives an unbiased estimate of the sum over all frames (rescaled
        by the observed-frame ratio), at a cost that does not grow with T."""
        T = per_frame[0].shape[1]
        idx = torch.randperm(T, device=per_frame[0].device)[:count].sort().values
        return tuple(x[:, idx] for x in per_frame)

    def _reconstruction(self, s: torch.Tensor, frames: torch.Tensor, obs_f: torch.Tensor
                        ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """``(nll, mse, recon)`` of the positions ``s`` [B, T, q] against ``frames`` [B, T, C, H, W]:
        the likelihood's negative log summed over the pixels of the observed frames (weights
        ``obs_f`` [B, T]; not yet normalised), the mean squared error per pixel of the observed
        frames' means, and the mean frames."""
        logits = self.decode_logits(s)
        recon = torch.sigmoid(logits)
        if self.log_noise is None:
            nll_pix = bernoulli_nll(logits, frames)
        else:
            nll_pix = gaussian_nll(recon, frames, self.log_noise.view(-1, 1, 1))
        nll = (nll_pix.flatten(2).sum(2) * obs_f).sum()
        mse = (((recon - frames) ** 2).flatten(2).mean(2) * obs_f).sum() / obs_f.sum().clamp_min(1.0)
        return nll, mse, recon

    def _kl_terms(self, dist, B: int, norm: torch.Tensor, share: float
                  ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """``(kl_s0, kl_v0, kl_w)`` of :meth:`forward` per observed pixel (``norm``: observed
        pixels per sequence, ``B`` sequences); the weight KL is counted at ``share`` = the window's
        share of the training set's frames."""
        s_mean, s_logvar, v_mean, v_logvar = dist
        kl_s0 = kl_std_normal(s_mean, s_logvar).sum() / B / norm
        kl_v0 = kl_std_normal(v_mean, v_logvar).sum() / B / norm
        kl_w = self.field.kl() * share / norm
        return kl_s0, kl_v0, kl_w

    def _check_batch(self, frames, t, n_total_frames: int, mask) -> tuple[torch.Tensor, torch.Tensor]:
        """:meth:`forward`'s inputs checked: ``(t as a tensor, mask of present frames [B, T])``."""
        self._check_frames(frames, "forward", self.k)
        B, T = frames.shape[:2]
        t = torch.as_tensor(t, dtype=frames.dtype).to(frames.device)
        if t.shape != (T,):
            raise ValueError(f"forward: t must have shape [{T}], got {list(t.shape)}")
        if n_total_frames < 1:
            raise ValueError(f"forward: n_total_frames must be positive, got {n_total_frames}")
        obs = (torch.ones(B, T, dtype=torch.bool, device=frames.device) if mask is None
               else torch.as_tensor(mask, dtype=torch.bool).to(frames.device))
        if obs.shape != (B, T):
            raise ValueError(f"forward: mask must have shape [{B}, {T}], got {list(obs.shape)}")
        return t, obs

    def _agreement(self, frames, s, obs, scale, agreement_frames: int) -> torch.Tensor:
        """The agreement term of :meth:`forward` (times ``scale``): the position encoder's means on
        the present frames 1.. against the trajectory's positions ``s``, on at most
        ``agreement_frames`` of them drawn at random (0: all; rescaled to stay unbiased)."""
        if not (self.cfg.agreement_weight > 0 and s.shape[1] > 1):
            return frames.new_zeros(())
        later, x_later, s_later = obs[:, 1:], frames[:, 1:], s[:, 1:]
        if 0 < agreement_frames < later.shape[1]:
            pick = torch.randperm(later.shape[1], device=frames.device)[:agreement_frames]
            n_later = later.sum()
            later, x_later, s_later = later[:, pick], x_later[:, pick], s_later[:, pick]
            scale = scale * n_later / later.sum().clamp_min(1)
        if not later.any():
            return frames.new_zeros(())
        # both sides learn: the trajectory follows the encoder's reading of each frame and the encoder
        # learns to read every frame, not only first ones (measured on one clip: a stop-gradient on
        # the encoder side made weights >= 1 collapse to the mean frame)
        enc_mean, _ = self.encode_positions(x_later[later])
        return scale * 0.5 * ((enc_mean - s_later[later]) ** 2).sum()

    # --------------------------------------------------------------------------- rollout
    def sample_latents(self, ctx: torch.Tensor, t: torch.Tensor, samples: int, mean_weights: bool,
                       sample_init: bool, generator: torch.Generator | None = None,
                       ctx_t: torch.Tensor | None = None) -> torch.Tensor:
        """Latent paths [S, B, N, 2q] of :meth:`rollout` (same draws, same order), before any spread
        scale and without decoding."""
        B = ctx.shape[0]
        s_mean, s_logvar, v_mean, v_logvar = self.encode_dist(ctx, ctx_t)
        state0 = torch.cat([s_mean, v_mean], 1).repeat(samples, 1)
        if sample_init:
            logvar = torch.cat([s_logvar, v_logvar], 1).repeat(samples, 1)
            state0 = _reparam(state0, logvar, generator)
        weights = self.field.sample(samples * B, mean=mean_weights, generator=generator)
        states = self.integrate_any(state0, t, weights)  # [N, S·B, 2q]
        latents = states.transpose(0, 1).reshape(samples, B, states.shape[0], 2 * self.q)
        return latents

    def rollout(self, ctx: torch.Tensor, t: torch.Tensor, samples: int = 1, mean_weights: bool = True,
                sample_init: bool = False, generator: torch.Generator | None = None,
                ctx_t: torch.Tensor | None = None):
        """Decode frames at model times ``t`` (relative to ``ctx[:, 0]``; any order, may be < 0).

        Parameters
        ----------
        ctx : Tensor [B, k, C, H, W]
            Context frames (the first ``velocity_frames`` are used).
        t : Tensor [N]
            Model times relative to the first context frame.
        samples : int
            Futures per sequence (S).
        mean_weights : bool
            Posterior-mean weights; False draws weights per future and sequence (the
            "deterministic" variant has only mean weights).
        sample_init : bool
            Draw s0, v0 from the encoder's posterior; False uses its means.
        generator : torch.Generator, optional
            Noise source for reproducible samples.
        ctx_t : Tensor [k], optional
            Model times of the context frames relative to the first (see :meth:`encode_dist`).

        Returns
        -------
        frames : Tensor [S, B, N, C, H, W]
        latents : Tensor [S, B, N, 2q]
            With ``samples`` > 1, spread about their mean by the buffer ``spread_scale``.
        """
        if samples < 1:
            raise ValueError(f"rollout: samples must be at least 1, got {samples}")
        self._check_frames(ctx, "rollout", self.k)
        latents = self.sample_latents(ctx, t, samples, mean_weights, sample_init, generator, ctx_t)
        if samples > 1 and float(self.spread_scale) != 1.0:  # calibrated spread about the samples' mean
            latents = spread_about_mean(latents, self.spread_scale)
        return self.decode(latents[..., :self.q]), latents


def spread_about_mean(samples: torch.Tensor, scale) -> torch.Tensor:
    """Samples [S, ...] with their deviations from the samples' mean multiplied by ``scale``."""
    centre = samples.mean(dim=0, keepdim=True)
    return centre + scale * (samples - centre)


def latent_size(model_cfg) -> int:
    """Size q of the latent position: 2 × keypoints with the keypoint encoder, else latent_dim."""
    return 2 * int(model_cfg.keypoints) if model_cfg.encoder == "keypoints" else int(model_cfg.latent_dim)


def build_model(cfg, channels: int) -> LatentODE:
    """The model for ``cfg`` (sizes from ``cfg.model``, frame size ``cfg.data.size``).

    Examples
    --------
    >>> from kinecast.config import Config
    >>> cfg = Config(); cfg.data.size = 32
    >>> build_model(cfg, 1).rollout(torch.zeros(2, 3, 1, 32, 32), torch.tensor([0.0, 0.1]))[0].shape
    torch.Size([1, 2, 2, 1, 32, 32])
    """
    return LatentODE(cfg.model, cfg.solver, channels, cfg.data.size)
