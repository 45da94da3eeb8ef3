"""The staged recipe: which stage a step is in, what each stage trains, and the stages' own state.

``train.recipe = "staged"`` splits one budget into three stages by progress (steps or seconds):

1. *positions* (``train.positions_share``): position encoder + decoder as a frame autoencoder over
   the static background, deterministic until it clearly beats the background alone (the escape
   test), then sampled with the KL weight rising to ``train.positions_kl``. An encoder that has not
   escaped by ``train.escape_deadline`` of the stage starts again from a new seed; one that found
   the object and lost it again goes back to its best weights since then (a snapshot).
2. *dynamics* (``train.dynamics_share``): encoder and decoder frozen; the field and the velocity
   encoder fit the encoded trajectories (:func:`kinecast.model.staged.dynamics_terms`), with long
   windows (two periods of the tracked object, see :data:`DYNAMICS_PERIODS`). Validation (the
   held-out forecast that picks the weights kept) starts here: the first forecasting model is kept
   as soon as it exists.
3. *joint*: the full ELBO end to end, as the ``end_to_end`` recipe does from its first step.

Everything here is a function of the step's progress and of :class:`StageState`, which is saved in
every checkpoint, so a resumed run takes the same path as an uninterrupted one.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import torch

from ..model import build_model
from ..model.identities import follow
from ..model.staged import encode_all
from ..frames import tracks

POSITIONS, DYNAMICS, JOINT = "positions", "dynamics", "joint"
NUMBER = {POSITIONS: 1, DYNAMICS: 2, JOINT: 3}  # the stage column of log.csv
EMA = 0.9  # smoothing of the escape test's running errors (about the last 10 steps)
ESCAPE_MIN_STEPS = 10  # positions steps before the escape test is trusted (EMA warm-up)
# The dynamics stage's windows grow to this many periods of the tracked object (enough to pin a
# period down), at least DYNAMICS_MIN_WINDOW frames; DYNAMICS_NO_PERIOD_WINDOW when none is found.
# No longer: on the ball rig (bounce period 17 frames) 60-frame windows left the sideways drift
# wrong after each bounce even on training trials; offline (bench/field_offline.py, one frozen
# encoder, 75 s, with train.dynamics_robust_px 2) 36-frame windows gave 1.73 px @60 held out
# against 2.31 with 60; the spring (24 frames) 0.54 with 49 against 0.53 with 60
DYNAMICS_PERIODS = 2
DYNAMICS_MIN_WINDOW = 20
# 20 when no period is found (defaults 16; 60 before): on the air table, the one rig without a period,
# a field shared by the keypoints rolled out 8.7 / 2.9 px @20 held out with 20-frame windows against
# 9.4 / 2.9 with 36 (two frozen encoders, bench/field_offline.py, 75 s), and a 20-frame window's step
# costs a third of a 60-frame one's
DYNAMICS_NO_PERIOD_WINDOW = 20
OBJECT_COUNT_STRIDE = 5  # every 5th frame is enough to count the objects a scene shows (alike_objects)
# Second-heaviest foreground piece / heaviest, median over frames with two or more, from which pieces
# count as alike objects. Measured (8 training trials per scene, 64 px): air table pucks 0.72-0.94 in six
# looks (in grey one puck colour is lighter); pieces of one body or an object and its shadow lower —
# spring rod look (mass and coil apart) 0.15, ball on a floor drawn by other code 0.50 (DEVELOPERS.md)
ALIKE_WEIGHT = 0.6
# An attempt is restarted at its deadline only while its reconstruction is still this close to the bare
# background's error (it has found nothing). One that is part way (e.g. one of two pucks found: 0.35-0.4
# on the air table) keeps going: a restart threw such progress away there.
STUCK_RATIO = 0.8
RESTART_SEED_STRIDE = 1000  # restart r of the positions stage re-initialises with seed + r·stride
# An encoder that found the object can lose it again once its latent is sampled: measured in two of
# the twelve seed-1 bench runs of 2026-12-02 (spring gradient: 0.3x → 0.99x the background's error
# 15 steps after its escape; pendulum dark-on-light: the keypoint log-variance rose to its clamp
# and the error reached 0.97x 700 steps later); neither run then learned the motion. When the
# running error climbs back to STUCK_RATIO × the background's, the stage goes back to
# deterministic steps from the best snapshot (see SNAPSHOT_GAIN), and samples again after a new escape;
# after MAX_RELAPSES it stays deterministic for the rest of the stage.
MAX_RELAPSES = 2
# An encoder that lost the object goes back to the best weights it had while it had found it (the
# snapshot taken whenever its running error ratio improved by this factor), rather than training on
# from the broken state or restarting: on a rod pendulum drawn by other software the encoder reached
# 0.1x the background's error by step 400, then drifted back to 0.8x by step 1035, and the restarts
# that followed had too little of the stage left to find the object again.
SNAPSHOT_GAIN = 1.1
# At the end of the positions stage the snapshot replaces the current weights when the current
# running error ratio is this many times the snapshot's (it has lost much of what it had found).
RESTORE_FACTOR = 2.0


def stage_at(prog: float, tc) -> tuple[str, float]:
    """``(stage, progress within the stage in [0, 1])`` at overall progress ``prog``."""
    if tc.recipe == "end_to_end":
        return JOINT, prog
    a, b = tc.positions_share, tc.dynamics_share
    if prog < a:
        return POSITIONS, prog / a
    if prog < a + b:
        return DYNAMICS, (prog - a) / b
    rest = 1.0 - a - b
    return JOINT, min(1.0, (prog - a - b) / rest) if rest > 0 else 1.0


@dataclass
class StageState:
    """The positions stage's escape test and restarts (plain numbers: saved with checkpoints)."""

    escaped: bool = False
    escaped_step: int = -1
    restarts: int = 0
    steps: int = 0  # positions steps since the last (re)start
    ema_rec: float = math.nan
    ema_bg: float = math.nan
    joint_checked: bool = False  # the weights were validated on entering the joint stage
    relapses: int = 0  # times the encoder lost the object again after an escape
    since_escape: int = 0  # positions steps since the last escape
    best_ratio: float = math.inf  # best running error ratio (over the background's) since an escape

    def observe(self, mse: float, bg_mse: float, ratio: float, step: int) -> bool:
        """Fold one batch's errors in; True when this step passes the escape test."""
        self.steps += 1
        self.ema_rec = mse if math.isnan(self.ema_rec) else EMA * self.ema_rec + (1 - EMA) * mse
        self.ema_bg = bg_mse if math.isnan(self.ema_bg) else EMA * self.ema_bg + (1 - EMA) * bg_mse
        if self.escaped or self.steps < ESCAPE_MIN_STEPS or not self.ema_rec < ratio * self.ema_bg:
            return False
        self.escaped, self.escaped_step = True, step
        return True

    def lost(self) -> bool:
        """After :meth:`observe`: True when an escaped encoder has fallen back to near the bare
        background's error (it lost the object); it is then no longer escaped."""
        if not self.escaped:
            return False
        self.since_escape += 1
        if self.since_escape < ESCAPE_MIN_STEPS or self.ema_rec < STUCK_RATIO * self.ema_bg:
            return False
        self.escaped, self.since_escape = False, 0
        self.relapses += 1
        return True

    def improved(self) -> bool:
        """After :meth:`observe`: True when an escaped encoder's running error ratio beat the best so
        far by :data:`SNAPSHOT_GAIN` (time for a snapshot of its weights)."""
        if not self.escaped or self.since_escape < ESCAPE_MIN_STEPS:
            return False
        ratio = self.ema_rec / self.ema_bg
        if not ratio * SNAPSHOT_GAIN < self.best_ratio:
            return False
        self.best_ratio = ratio
        return True

    def restored(self) -> None:
        """The snapshot's weights were put back: warm the running errors up again from them."""
        self.ema_rec = self.ema_bg = math.nan
        self.steps = 0

    def worse_than_snapshot(self) -> bool:
        """True when the running error ratio is :data:`RESTORE_FACTOR` × the snapshot's or more."""
        return math.isfinite(self.best_ratio) and not self.ema_rec < RESTORE_FACTOR * self.best_ratio * self.ema_bg

    def sampling(self) -> bool:
        """Whether the positions stage samples its latent now (escaped, and not given up on it)."""
        return self.escaped and self.relapses < MAX_RELAPSES

    def due_restart(self, local: float, deadline: float) -> bool:
        """True when the encoder has found nothing (error still near the background's) by the
        deadline of its current attempt; an attempt that found the object once is not restarted
        (its snapshot is restored instead)."""
        stuck = not self.ema_rec < STUCK_RATIO * self.ema_bg
        found_once = math.isfinite(self.best_ratio)
        return not self.escaped and not found_once and stuck and local >= deadline * (self.restarts + 1)

    def state(self) -> dict:
        return asdict(self)


def set_trainable(model, stage: str) -> None:
    """Freeze what a stage does not train (frozen parameters get no gradient, so Adam skips them)."""
    seen = {POSITIONS: (True, False), DYNAMICS: (False, True), JOINT: (True, True)}[stage]
    for module in (model.pos_enc, model.decoder):
        module.requires_grad_(seen[0])
    for module in (model.vel_enc, model.field):
        module.requires_grad_(seen[1])


def reset_spread(model, opt) -> None:
    """Give the position encoder's posterior spread its starting value again (keypoint encoder)."""
    reset = getattr(model.pos_enc, "reset_spread", None)
    if reset is not None:
        for p in reset():
            opt.state.pop(p, None)


POSITIONS_PARTS = ("pos_enc", "decoder")  # what the positions stage trains
SNAPSHOT_PREFIX = "best_positions."  # their snapshot's keys in a resume checkpoint


def forget_moments(model, opt, parts=POSITIONS_PARTS) -> None:
    """Drop the optimiser's running statistics of ``parts`` (Adam starts them afresh at their next step)."""
    for name in parts:
        for p in getattr(model, name).parameters():
            opt.state.pop(p, None)


def snapshot_positions(model) -> dict[str, torch.Tensor]:
    """A copy of the position encoder's and decoder's weights (keys as in the model's state dict)."""
    return {k: v.detach().clone() for k, v in model.state_dict().items() if k.startswith(POSITIONS_PARTS)}


def restore_positions(model, opt, snap: dict[str, torch.Tensor]) -> None:
    """Put a :func:`snapshot_positions` back; forget the optimiser state of those weights."""
    model.load_state_dict(snap, strict=False)
    forget_moments(model, opt)


def restart_positions(model, opt, cfg, channels: int, seed: int) -> None:
    """Give the position encoder and decoder fresh weights drawn with ``seed``; forget their
    optimiser state."""
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        fresh = build_model(cfg, channels)
    for name in POSITIONS_PARTS:
        getattr(model, name).load_state_dict(getattr(fresh, name).state_dict())
    forget_moments(model, opt)


def alike_objects(recs, background) -> bool:
    """Do the recordings show several separate, alike moving objects? True when the median count per
    frame of :func:`~kinecast.frames.tracks.find_objects` (separate foreground pieces; every
    :data:`OBJECT_COUNT_STRIDE`-th present frame) is at least 2 and, in frames with two or more,
    the second-heaviest piece has a median of at least :data:`ALIKE_WEIGHT` of the heaviest's
    foreground. Decides ``model.field_per_keypoint = "auto"`` and ``model.keypoint_window = -1``:
    alike separate objects (pucks, beads) get one acceleration field shared by the keypoints and
    keypoints read around their heat maps' peaks; a body seen in two unequal pieces (a spring's mass
    and coil, a ball and its shadow) does not."""
    counts, ratios = [], []
    for r in recs:
        picked = r.frames[np.flatnonzero(~r.missing)[::OBJECT_COUNT_STRIDE]]  # copies only those frames
        for _, weight in tracks.find_objects(picked, background,
                                             with_weights=True):
            counts.append(len(weight))
            if len(weight) >= 2:
                top = np.sort(weight)[::-1]
                ratios.append(top[1] / top[0])
    return bool(counts) and float(np.median(counts)) >= 2 and float(np.median(ratios)) >= ALIKE_WEIGHT


def dynamics_window(recs, background, cfg, longest: int) -> tuple[int, float]:
    """Longest window of the dynamics stage and the tracked period it was sized from (s, or NaN)."""
    if cfg.train.dynamics_window:
        return min(longest, cfg.train.dynamics_window), math.nan
    periods = []
    for r in recs:
        ok = ~r.missing
        if ok.sum() >= 8:
            present = r.frames if ok.all() else r.frames[ok]  # no copy of a recording with no gap
            periods.append(tracks.track_period(tracks.centroid_track(present, background), r.times[ok]))
    period = float(np.nanmedian(periods)) if np.isfinite(periods).any() else math.nan
    want = DYNAMICS_NO_PERIOD_WINDOW
    if math.isfinite(period):
        dt = float(np.median(np.concatenate([np.diff(r.times) for r in recs])))
        want = max(DYNAMICS_MIN_WINDOW, math.ceil(DYNAMICS_PERIODS * period / dt) + 1)
    return min(longest, want), period


def grow(start: int, longest: int, local: float, share: float = 0.5) -> int:
    """Window length growing geometrically from ``start`` to ``longest`` over ``share`` of a stage."""
    if longest <= start:
        return longest
    return min(longest, int(start * (longest / start) ** min(1.0, local / share)))


def hold_still(model, targets: "EncodedTrajectories", still_px: float) -> list[int]:
    """Hold still, in the field, every keypoint whose encoded position moves less than ``still_px``
    (rms over all training frames, model pixels); returns their indices.

    A keypoint the positions stage parked on a fixed part of the scene (a spring's clamp, a mark on
    the floor) carries no motion; left free, the field extrapolates it off its training values once a
    forecast leaves them, and it feeds back into the moving keypoints (the ball rig: a parked keypoint
    drifted 20 px off the image in 60 frames). Only for the keypoint encoder; 0 turns it off.
    """
    moving = model.field.moving
    moving.fill_(1.0)
    if not model.keypoints or still_px <= 0 or not model.field.second_order:
        return []
    pos = torch.cat(targets.means).to(moving)  # [frames, q]
    rms = pos.std(dim=0).view(-1, 2).pow(2).sum(1).sqrt() * model.size / 2.0  # model pixels per keypoint
    still = [i for i, r in enumerate(rms.tolist()) if r < still_px]
    if len(still) == len(rms):  # nothing moves: hold nothing (the verdict reports the failure)
        return []
    for i in still:
        moving[2 * i:2 * i + 2] = 0.0
    return still


class EncodedTrajectories:
    """Every training frame's encoded position (means and variances), computed once per stage."""

    def __init__(self, model, frames: list[torch.Tensor], device, valid: list[np.ndarray] | None = None):
        was = model.training
        model.eval()
        enc = [encode_all(model, f.to(device)) for f in frames]
        model.train(was)
        if model.tracking:  # one slot per object through each recording (identities.py)
            for i, (m, v) in enumerate(enc):
                ok = None if valid is None else torch.as_tensor(valid[i])[None]
                enc[i] = [x[0] for x in follow(m[None], v[None], valid=ok)]
        self.means = [m for m, _ in enc]
        self.vars = [v for _, v in enc]

    def gather(self, which, starts, window: int) -> tuple[torch.Tensor, torch.Tensor]:
        m = torch.stack([self.means[i][s:s + window] for i, s in zip(which, starts)])
        v = torch.stack([self.vars[i][s:s + window] for i, s in zip(which, starts)])
        return m, v
