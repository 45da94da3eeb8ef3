"""Loss terms of the first two training stages: positions (a frame autoencoder) and dynamics on
encoded trajectories. The third stage is the full ELBO, :meth:`LatentODE.forward`.

Both functions take the model explicitly and return the same kind of dict as ``forward``: a
``loss`` with gradients and detached terms for logging.

*Positions.* Every frame is encoded to its latent position and decoded again over the static
background. Deterministic (``sample=False``: the encoder's mean, no KL) until the reconstruction
clearly beats the background alone — sampling from the first step drowns the small differences
between frames in posterior noise and the decoder learns the mean frame — then sampled with a
small KL weight so the encoder's variances say how sure it is of each coordinate.

*Dynamics.* Encoder and decoder are frozen; the training frames' positions were encoded once
(means m_t and variances σ²_t). From s0 ~ q(s0) and v0 ~ q(v0) (the velocity encoder) the field
is integrated over a window and scored by the Gaussian log-density of the encoded means around
the trajectory, each coordinate weighted by 1/σ²: coordinates the encoder does not use (σ² near
the prior's 1) do not dominate. A finite-difference velocity from the first three encoded
positions anchors v0 (second-order one-sided difference, a handbook formula).
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from .gauss import bernoulli_nll, gaussian_nll, kl_std_normal
from .keypoints import heat_map_shape, pixel_grid
from .latent_ode import fd_velocity

# Variance floor of the encoded positions in the dynamics loss, in (units per pixel)²: half a
# pixel of the keypoint grid (2 / size per pixel). No position is trusted to better than that.
VAR_FLOOR_PIXELS = 0.5
# Foreground threshold of the coverage term in robust σ of the frame's difference from the
# background: a Gaussian exceeds 5σ with probability ~3e-7 (normal table), so a frame of pure sensor
# noise has no foreground (at 3σ, the bench's first runs, one or two noise pixels per frame passed
# and took all of a still frame's weight)
NOISE_SIGMAS = 5.0


def _pixel_nll(model, logits: torch.Tensor, frames: torch.Tensor) -> torch.Tensor:
    if model.log_noise is None:
        return bernoulli_nll(logits, frames)
    return gaussian_nll(torch.sigmoid(logits), frames, model.log_noise.view(-1, 1, 1))


def keypoint_overlap(points: torch.Tensor, width: float) -> torch.Tensor:
    """Mean over frames of Σ_{i<j} exp(−|p_i − p_j|² / 2·width²) for keypoints ``points`` (N, 2K):
    1 for each pair of keypoints on the same spot, 0 for pairs far apart."""
    p = points.reshape(points.shape[0], -1, 2)
    d2 = ((p[:, :, None] - p[:, None]) ** 2).sum(-1)
    k = p.shape[1]
    upper = torch.triu(torch.ones(k, k, dtype=torch.bool, device=p.device), diagonal=1)
    return torch.exp(-d2[:, upper] / (2 * width ** 2)).sum(1).mean()


def foreground_weights(frames: torch.Tensor, background: torch.Tensor, size: int) -> torch.Tensor:
    """Where each frame differs from the static background: frames [N, C, H, W] → weights [N, size, size]
    summing to 1 per frame (0 for a frame with no clear difference).

    |frame − background| summed over channels, area-averaged to ``size``, minus the frame's median
    (a global lighting change) and :data:`NOISE_SIGMAS` scaled median absolute deviations of it
    (sensor noise; the MAD × 1.4826 estimates a Gaussian's σ, a handbook robust-statistics constant).
    """
    d = (frames - background.to(frames)).abs().sum(1, keepdim=True)
    d = F.interpolate(d, size=(size, size), mode="area").flatten(1)
    med = d.median(dim=1, keepdim=True).values
    mad = (d - med).abs().median(dim=1, keepdim=True).values * 1.4826
    w = torch.relu(d - med - NOISE_SIGMAS * mad)
    total = w.sum(1, keepdim=True)
    w = torch.where(total > 0, w / total.clamp_min(1e-12), torch.zeros_like(w))
    return w.view(-1, size, size)


def keypoint_coverage(points: torch.Tensor, weights: torch.Tensor, width: float) -> torch.Tensor:
    """Mean over frames of Σ_p w_p · softmin_j(d²_pj) — the soft k-means distortion of the foreground
    weights ``weights`` [N, h, w] around the keypoints ``points`` [N, 2K] (normalised units).

    Small when every part of what moves has a keypoint near it: with two keypoints on one of two
    pucks, the other puck's pixels pull the nearer keypoint over to it. ``width`` sets the softness
    of the assignment (responsibilities ∝ exp(−d² / 2·width²), as in soft k-means, common practice).
    """
    N, h, w = weights.shape
    p = points.reshape(N, -1, 2)
    gy, gx = torch.meshgrid(pixel_grid(h, points.device, points.dtype),
                            pixel_grid(w, points.device, points.dtype), indexing="ij")
    pix = torch.stack([gx, gy], dim=-1).reshape(1, h * w, 1, 2)
    d2 = ((pix - p[:, None]) ** 2).sum(-1)  # [N, h·w, K]
    resp = torch.softmax(-d2 / (2 * width ** 2), dim=2)
    return ((resp * d2).sum(2) * weights.reshape(N, -1)).sum(1).mean()


def autoencoder_terms(model, frames: torch.Tensor, sample: bool, beta: float, repulsion: float = 0.0,
                      coverage: float = 0.0, shape: float = 0.0, whole_map: bool = False) -> dict:
    """Frame autoencoder loss per pixel: frames [N, C, H, W] → position → frame.

    Returns ``loss`` (NLL + beta·KL(q(s)‖N(0, I)) per pixel, plus ``repulsion`` × the keypoints'
    :func:`keypoint_overlap` at twice the blob width, which spreads keypoints over several objects,
    plus ``coverage`` × their :func:`keypoint_coverage` of the foreground at the encoder's resolution,
    plus ``shape`` × the heat maps' :func:`~kinecast.model.keypoints.heat_map_shape`), ``nll``,
    ``kl_s0``, ``mse`` (of the reconstruction), ``bg_mse`` (of the background alone, for the escape
    test), ``overlap``, ``coverage`` and ``heat_shape``. ``whole_map``: keypoints read over their whole
    heat maps whatever ``model.keypoint_window`` says (before the object is found, when a map's peak
    is anywhere).
    """
    heat = None
    if model.keypoints:
        mean, logvar, log_maps = model.pos_enc(frames, model.background, with_maps=True, whole_map=whole_map)
        if shape > 0:
            heat = heat_map_shape(log_maps, centre=mean.view(log_maps.shape[0], -1, 2))
    else:
        mean, logvar = model.encode_positions(frames)
    s = mean + (0.5 * logvar).exp() * torch.randn_like(mean) if sample else mean
    logits = model.decode_logits(s)
    pixels = float(frames[0].numel())
    nll = _pixel_nll(model, logits, frames).flatten(1).sum(1).mean() / pixels
    kl = kl_std_normal(mean, logvar).sum(1).mean() / pixels if sample else nll.new_zeros(())
    with torch.no_grad():
        mse = ((torch.sigmoid(logits) - frames) ** 2).mean()
        bg_mse = ((model.background - frames) ** 2).mean()
    overlap = cover = nll.new_zeros(())
    if model.keypoints and model.q > 2:
        overlap = keypoint_overlap(mean, 2 * model.cfg.blob_std)
    if model.keypoints and coverage > 0:
        with torch.no_grad():
            weights = foreground_weights(frames, model.background, model.pos_enc.half)
        cover = keypoint_coverage(mean, weights, 2 * model.cfg.blob_std)
    heat = nll.new_zeros(()) if heat is None else heat
    loss = nll + beta * kl + repulsion * overlap + coverage * cover + shape * heat
    return {"loss": loss, "nll": nll.detach(), "kl_s0": kl.detach(), "mse": mse, "bg_mse": bg_mse,
            "overlap": overlap.detach(), "coverage": cover.detach(), "heat_shape": heat.detach()}


@torch.no_grad()
def encode_all(model, frames: torch.Tensor, chunk: int = 256) -> tuple[torch.Tensor, torch.Tensor]:
    """Position means and variances of every frame [T, C, H, W] → ([T, q], [T, q]); keypoint means
    refined by the decoder where ``model.read_refinement`` asks (:meth:`LatentODE.read_positions`)."""
    means, variances = [], []
    for part in frames.split(chunk):
        m, lv = model.read_positions(part)
        means.append(m)
        variances.append(lv.exp())
    return torch.cat(means), torch.cat(variances)


def huber(err: torch.Tensor, delta: float) -> torch.Tensor:
    """Huber's loss of ``err``: ``err²/2`` within ``delta``, ``delta·|err| − delta²/2`` beyond it
    (continuous, with a continuous slope); ``delta`` = 0: ``err²/2`` everywhere.

    Examples
    --------
    >>> huber(torch.tensor([0.5, 3.0]), 1.0).tolist()
    [0.125, 2.5]
    """
    if delta <= 0:
        return 0.5 * err ** 2
    return F.huber_loss(err, torch.zeros_like(err), reduction="none", delta=delta)


def dynamics_terms(model, ctx: torch.Tensor, t: torch.Tensor, target_mean: torch.Tensor,
                   target_var: torch.Tensor, mask: torch.Tensor, n_total_frames: int, beta: float,
                   velocity_aux: float, weight_kl: float = 1.0, robust_px: float = 0.0) -> dict:
    """Dynamics loss per latent coordinate on encoded trajectories.

    Parameters
    ----------
    ctx : Tensor [B, k, C, H, W]
        The windows' first frames (for the velocity encoder).
    t : Tensor [T]
        Model times of the window, relative to its first frame.
    target_mean, target_var : Tensor [B, T, q]
        Encoded positions of every frame of the windows.
    mask : Tensor [B, T] of bool
        Present frames.
    n_total_frames : int
        Frames in the training set (the weight KL is scaled by T / n_total_frames).
    beta : float
        Weight of the KL terms.
    velocity_aux : float
        Weight of the finite-difference velocity term.
    weight_kl : float
        Extra factor on the field's weight KL (1: the ELBO; < 1: a tempered posterior).
    robust_px : float
        Errors beyond this many model pixels count linearly instead of squared (Huber's loss, 0:
        Gaussian throughout): a bounce forecast a frame early leaves an error of many pixels that
        would otherwise drown every smaller error in the window (e.g. the ball's sideways drift).

    References
    ----------
    P. J. Huber (1964). Robust estimation of a location parameter. Ann. Math. Statist. 35, 73-101.
    """
    B, T, q = target_mean.shape
    floor = (VAR_FLOOR_PIXELS * 2.0 / model.size) ** 2
    var = target_var + floor
    _, _, v_mean, v_logvar = model.encode_dist(ctx, t[:model.k] - t[0])
    s0 = target_mean[:, 0] + target_var[:, 0].sqrt() * torch.randn_like(target_mean[:, 0])
    v0 = v_mean + (0.5 * v_logvar).exp() * torch.randn_like(v_mean)
    weights = model.field.sample(B)
    s = model.integrate(torch.cat([s0, v0], dim=1), t - t[0], weights).transpose(0, 1)[..., :q]
    obs = mask.to(s.dtype)
    per = T * q
    nll = (huber(s - target_mean, robust_px * 2.0 / model.size) / var).sum(2)
    nll = (nll * obs).sum() / B / per
    dt = t[1] - t[0]
    aux = target_mean.new_zeros(())
    # with v0 = the finite difference alone (no learned correction) the term is identically zero
    fd_only = model.velocity_from_positions and not model.velocity_correction
    if velocity_aux > 0 and not fd_only and T >= 3 and bool(mask[:, :3].all()):
        v_fd = fd_velocity(target_mean, t)
        aux = (0.5 * ((v_mean - v_fd) * dt) ** 2 / var[:, 0]).sum() / B / per
    kl_v0 = kl_std_normal(v_mean, v_logvar).sum() / B / per
    kl_w = model.field.kl() * (T / float(n_total_frames)) / per
    loss = nll + velocity_aux * aux + beta * (kl_v0 + weight_kl * kl_w)
    with torch.no_grad():
        err = ((s - target_mean) ** 2).mean(2)
        latent_mse = (err * obs).sum() / obs.sum().clamp_min(1.0)
    return {"loss": loss, "nll": nll.detach(), "velocity_aux": aux.detach(), "kl_v0": kl_v0.detach(),
            "kl_w": kl_w.detach(), "latent_mse": latent_mse}
