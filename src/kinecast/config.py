"""The one configuration object shared by readers, model, trainer, forecaster and scorer.

A :class:`Config` is a tree of dataclasses with the sections ``data``, ``model``, ``solver``,
``train``, ``forecast`` and ``score``. It is read from TOML, overridden from the command line with
``--set section.key=value``, validated with messages that name the key, the bad value and what is
allowed, and written back as TOML that reads back identical.

Examples
--------
>>> cfg = Config()
>>> cfg = apply_overrides(cfg, ["model.latent_dim=8", "train.budget=2m"])
>>> cfg.model.latent_dim
8
>>> from_toml_text(to_toml_text(cfg)) == cfg
True
"""

from __future__ import annotations

import dataclasses
import math
import re
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib  # type: ignore[no-redef]

from .errors import KinecastError, closest, did_you_mean


def _opt(default: Any, help: str, choices: tuple | None = None, lo: float | None = None,
         hi: float | None = None, length: tuple[int, ...] | None = None):
    """A config field with its help text and the values it allows."""
    meta = {"help": help, "choices": choices, "lo": lo, "hi": hi, "length": length}
    if isinstance(default, list):
        return field(default_factory=lambda: list(default), metadata=meta)
    return field(default=default, metadata=meta)


@dataclass
class DataConfig:
    """How recordings are read and preprocessed (once, on read)."""

    size: int = _opt(64, "model frame size in pixels (square: a non-square picture keeps its "
                         "aspect ratio and is padded to square with its edge pixels)", lo=8, hi=512)
    color: str = _opt("grey", "channels fed to the model", choices=("grey", "rgb"))
    roi: list = _opt([], "crop before resizing: [x, y, width, height] in source pixels; [] = whole frame",
                     length=(0, 4))
    fps: float = _opt(0.0, "frame rate when no timestamps CSV or video rate is known; 0 = use the source's own",
                      lo=0.0)
    gap_factor: float = _opt(1.5, "an interval above this × the median interval marks dropped frames", lo=1.01)
    min_frames: int = _opt(3, "fewest frames a recording may have", lo=2)
    cache: bool = _opt(True, "cache frames at model resolution so a second read is cheap")
    cache_dir: str = _opt("", "cache folder; '' = ~/.cache/kinecast")

    @property
    def channels(self) -> int:
        """Channels of a preprocessed frame: 3 for ``color = "rgb"``, else 1."""
        return 3 if self.color == "rgb" else 1


WINDOW_AUTO = -1  # model.keypoint_window: decided by fit from the training frames


@dataclass
class ModelConfig:
    """Sizes and options of the latent ODE model."""

    variant: str = _opt("second_order", "dynamics family",
                        choices=("second_order", "first_order", "deterministic"))
    encoder: str = _opt("keypoints", "position encoder: keypoints (K image coordinates from heat maps; "
                        "decoder draws blobs there) or dense (a conv net with a dense head)",
                        choices=("keypoints", "dense"))
    keypoints: int = _opt(2, "keypoints K of the keypoint encoder (the latent position has 2K numbers)",
                          lo=1, hi=32)
    # 0.06 of the half frame width ≈ 2 px at 64 px: about the size of a small bob's edge blur
    blob_std: float = _opt(0.06, "width of the keypoint decoder's blobs (1.0 = half the frame width)",
                           lo=1e-3, hi=2.0)
    latent_dim: int = _opt(8, "size of the latent position s (and of the velocity v) with the dense "
                           "encoder; the keypoint encoder uses 2 × model.keypoints", lo=1, hi=256)
    enc_channels: int = _opt(32, "base channel count of the conv encoders", lo=4, hi=512)
    dec_channels: int = _opt(32, "base channel count of the conv decoder", lo=4, hi=512)
    # ReLU 128×3 with prior std 3 (defaults 12): the ball 3.68 px @60 where tanh 64×2 gave 5.4-6.8, the
    # ball drawn by other code 3.79 px where it gave 5.5-6.5, and no smooth rig lost (DEVELOPERS.md, tenth
    # session; bench/results/recipe_runs.jsonl). A piecewise-linear field can bend sharply at a floor or
    # a rail; tanh 64×2 smooths the bounce away
    hidden: int = _opt(128, "hidden width of the acceleration field", lo=4, hi=2048)
    hidden_layers: int = _opt(3, "hidden layers of the acceleration field", lo=1, hi=8)
    field_activation: str = _opt("relu", "hidden activation of the acceleration field (relu forms the "
                                 "steep walls of impacts)", choices=("tanh", "relu", "softplus"))
    # auto (defaults 16): on the air table (two pucks that do not interact) one field over all coordinates
    # learned accelerations the pucks never had: offline (bench/field_offline.py, frozen encoders, 75 s) its
    # held-out free rollouts were ~10 px off @20 frames, worse than no field at all (4.9), where a field
    # shared by the keypoints got 2.3-8.7 px; full 5-minute runs (with 20-frame dynamics windows) s2 14.0
    # -> 8.6 px per puck @20 against the same day's d15, s3 -> 3.8 (d15 8.5 the day before). On one object
    # whose two keypoints both move (a spring's mass and coil) a shared field must give two points of one
    # body one law: spring classic s6 1.55 px, period off 2.1 % (0.93-1.23 px, 0.1-0.9 % in five earlier
    # runs), ball s2 6.24 px (4.08 the same day), hence "auto" (train/stages.py alike_objects; the
    # air table s4 / s5 pairs: 11.0 -> 10.0, 18.5 -> 8.0; DEVELOPERS.md, thirteenth session)
    field_per_keypoint: str = _opt("auto", "keypoint encoder, second order: on = one acceleration field shared "
                                   "by the keypoints (each keypoint's own position and velocity in, its own "
                                   "acceleration out), for separate objects that do not push on each other; "
                                   "off = one field over all coordinates at once; auto = on where the training "
                                   "frames show several separate moving objects of about the same size and "
                                   "contrast (decided by fit and written to the run's config)", choices=("auto", "on", "off"))
    # auto (defaults 17): where the frames show alike objects a keypoint's heat map also holds mass on the
    # other object (a conv net fires alike on alike things); a whole-map read is pulled towards it, or the
    # encoder sharpens the map into one cell to suppress it and the keypoint snaps to the cell grid. Air
    # table, 5-minute runs, per puck @20 frames, 3 cells against d16: classic s2 4.37 vs 6.01 the same day
    # (8.6 the day before), s3 2.98 vs 3.8, s4 6.24 vs 10.0, s5 8.00 vs 8.0, dark on light s2 6.62 vs 12.7,
    # s6 6.11 vs 11.19, gradient s2 12.14 vs 13.13, textured s2 13.84 vs 8.55, drift + noise s2 5.68 vs 7.26
    # (better on 7 of 9 pairs, median 6.2 vs 8.6; one seed's spread 5-13 px).
    # On one object it hurt: spring classic s6 1.87 px (0.93-1.23 in five earlier runs), spring rod s6
    # 1.73 (0.31-0.38), pendulum dark on light s6 4.92 (0.38-1.80), hence auto (DEVELOPERS.md, fourteenth session)
    keypoint_window: int = _opt(WINDOW_AUTO, "keypoint encoder: read each keypoint within this many heat-map cells (2 px "
                                "at 64 px) of its map's peak, so mass the map holds on another, alike object "
                                "does not pull it (once the positions stage has found the objects; before, "
                                "the whole map); 0 = over the whole map; -1 = auto: "
                                "3 cells where the training frames show several alike separate objects (as "
                                "model.field_per_keypoint auto), else 0 (decided by fit and written to the "
                                "run's config)", lo=-1, hi=64)
    # True: in grey the air table's two pucks look alike and the encoder swapped them between frames;
    # same-day 5-minute bench/recipe.py pairs: air table s2 12.6 -> 7.3 px per puck @20, s3 5.8 -> 8.5
    # (no consistent gain shown); no keypoint reordered on single-object scenes (DEVELOPERS.md)
    # on (defaults 19): the 64 px bf16 step 1.37x -> 1.70x fp32's speed; paired 5-minute runs: spring
    # classic s8 1.87 px (off 1.84), dark on light s8 1.22 (0.97), drift + noise s8 1.15 (1.04 with
    # defaults 17), gradient s8 2.12 (off, the same day: 2.23), s7 0.66 (0.53 with defaults 17);
    # pendulum classic s6 0.46 (0.46), dark on light s8 0.42 (0.48) (DEVELOPERS.md, twentieth
    # session). With the heat maps in bf16 too it lost spring runs (see train.precision)
    keypoint_trunk_low_precision: bool = _opt(True, "keypoint encoder: run its conv trunk in train.precision's "
                                              "format too (bf16 where that is in use); its heat maps, their "
                                              "softmax and the positions read from them stay float32")
    keypoint_tracking: bool = _opt(True, "keypoint encoder: keep each keypoint on one object from frame to frame "
                                   "(constant-velocity prediction + least-distance assignment) where the encoder "
                                   "reads alike objects in a different order; in the context frames and the "
                                   "dynamics stage's encoded tracks")
    # 0 (off): reads improved (air table, held-out: second-difference jitter 0.75-1.9 -> 0.14 px/frame² at
    # 60 steps, 0.23 at 30), forecasts not shown to (same-day 5-minute runs, 60 steps: air table s2 14.0
    # -> 15.3 px per puck @20, s3 5.4; ball s2 4.08 -> 3.94 px @60; spring classic 1.17, pendulum dark on
    # light 1.80, within their spreads) and, before validation windows were batched, 25 % fewer steps in
    # 5 minutes (DEVELOPERS.md, thirteenth session)
    read_refinement: int = _opt(0, "keypoint encoder: gradient steps that move each keypoint read to where the "
                                "decoder's drawing of it matches the frame best (model/refine.py), wherever no "
                                "gradient is taken: forecasts, scores, validation and the dynamics stage's "
                                "encoded tracks; 0 = the encoder's reads as they are", lo=0, hi=1000)
    read_refinement_px: float = _opt(0.5, "first step size of model.read_refinement in model pixels (Adam, "
                                     "decayed to 0 along a cosine)", lo=1e-4, hi=10.0)
    velocity_frames: int = _opt(3, "frames stacked by the velocity encoder", lo=2, hi=16)
    # True: on the ball rig the position error over the first 20 forecast frames fell from 4.1 to
    # 2.7 px (sideways velocity no longer guessed wrong), pendulum 1.07 → 1.02 px (one run each)
    velocity_from_positions: bool = _opt(True, "second order: v0 = the finite-difference velocity of the position "
                                         "encoder's readings of the context frames + the velocity encoder's "
                                         "correction (else the velocity encoder alone)")
    # one_sided: central did not win where it was paired the same day (5-minute bench/recipe.py runs:
    # ball s3 2.04 -> 2.80 px @60, pendulum dark on light s6 0.75 -> 1.03; air table s2 7.73 px per
    # puck @20 with it, 7.34 without), all within one seed's run-to-run spread (DEVELOPERS.md, twelfth session)
    context_velocity: str = _opt("one_sided", "second order, v0 from the context frames' positions: one_sided (the "
                                 "three-point derivative at the first frame) or central (the three-point "
                                 "derivative at the second frame, carried back to the first by one step of "
                                 "the field; 3.6x less read noise in it)", choices=("one_sided", "central"))
    # False: the correction came from a conv net with a dense head that learned the training trials'
    # velocities; on held-out air-table trials it turned the right finite difference into a wrong
    # v0 (4 of 4 trials worse). Pendulum 0.79 -> 0.64 px @60 and 0.26 -> 0.11x the background's MSE,
    # spring 2.23 -> 2.29 px (bench/recipe.py, seed 0, classic look, one run each)
    velocity_correction: bool = _opt(False, "with model.velocity_from_positions: the velocity encoder adds a learned "
                                     "correction to the finite difference (else it gives only the spread)")
    # 3.0: with a ReLU 128×3 field, the weights' prior at std 1 pulls the steep parts flat (offline fits
    # on the ball's encoded track: 2.72 px @60 at std 3 against 3.13 px for the tanh 64×2 default at 1)
    prior_std: float = _opt(3.0, "std of the Gaussian prior on the field's weights", lo=1e-6)
    init_logstd: float = _opt(-5.0, "initial log-std of the field's weight posterior", lo=-20.0, hi=2.0)
    likelihood: str = _opt("bernoulli", "pixel likelihood", choices=("bernoulli", "gaussian"))
    background: bool = _opt(True, "decoder adds to a static background image (fixed camera)")
    # 3.0: on the pendulum bench set (64 px, W = 20, ~1500 steps, window_schedule 0.6) the 3W forecast
    # MSE was 0.08-0.22x persistence over three runs, 0.22x with 1.0, 0.35x with 10, 0.40x without
    agreement_weight: float = _opt(3.0, "weight of the encoder/trajectory agreement term", lo=0.0)


@dataclass
class SolverConfig:
    """How the latent ODE is integrated."""

    method: str = _opt("rk4", "ODE solver", choices=("rk4", "dopri5", "euler", "midpoint"))
    substeps: int = _opt(2, "fixed-step sub-steps per frame interval", lo=1, hi=64)
    rtol: float = _opt(1e-5, "relative tolerance (adaptive solvers)", lo=0.0)
    atol: float = _opt(1e-6, "absolute tolerance (adaptive solvers)", lo=0.0)
    adjoint: bool = _opt(False, "adjoint gradients (less memory for long windows, slower)")
    units_per_frame: float = _opt(0.1, "model time units per median frame interval", lo=1e-6)
    time_scale: float = _opt(0.0, "model time units per second; 0 = set from the data at fit time", lo=0.0)


@dataclass
class TrainConfig:
    """The CPU-sized training recipe."""

    seed: int = _opt(0, "random seed", lo=0)
    batch: int = _opt(8, "windows per step", lo=1, hi=4096)
    steps: int = _opt(0, "step budget; 0 = none (use the wall-clock budget)", lo=0)
    budget: str = _opt("5m", "wall-clock budget like 90s, 5m, 1h30m; '0' = none")
    recipe: str = _opt("staged", "training recipe: staged (positions, then dynamics on the encoded "
                       "trajectories, then everything jointly) or end_to_end (the full ELBO from the start)",
                       choices=("staged", "end_to_end"))
    positions_share: float = _opt(0.25, "staged: share of the budget for the positions stage (frame "
                                  "autoencoder)", lo=0.0, hi=0.9)
    dynamics_share: float = _opt(0.25, "staged: share of the budget for the dynamics stage (encoder and "
                                 "decoder frozen)", lo=0.0, hi=0.9)
    # 0.3: the feasibility study's switch point; an autoencoder that draws the object clearly beats
    # the bare background by far more (0.05-0.15 of its error once escaped)
    escape_ratio: float = _opt(0.3, "staged: the positions stage starts sampling once the reconstruction "
                               "error falls below this × the background-only error", lo=0.0, hi=1.0)
    # 1e-2: on the pendulum rig the autoencoder beat the background 0.3x after ~100 steps, against
    # ~190 at 3e-3 (one run each, 64 px, batch 64 frames)
    positions_lr: float = _opt(1e-2, "staged: peak learning rate of the positions stage", lo=0.0)
    # 3e-4: at the full 3e-3 the joint stage undid the dynamics stage on the pendulum rig (held-out
    # forecast MSE 0.00093 after the dynamics stage, 0.0033 fifty steps into the joint stage)
    joint_lr: float = _opt(3e-4, "staged: peak learning rate of the joint stage (fine-tuning; the dynamics "
                           "stage and the end_to_end recipe use train.lr)", lo=0.0)
    # True since the twenty-eighth session: with train.weight_average alone, on pendulum classic s11
    # the dynamics stage's best validated average came at 111 s (val MSE 4.4e-4) and its validation
    # got worse after it (5.9e-4 at the stage's end, 145 s); the joint stage, started from there,
    # never got back below the best (4.7e-4) and the weights kept were the 111 s ones (DEVELOPERS.md)
    joint_from_best: bool = _opt(True, "staged: the joint stage starts from the weights kept so far (the dynamics "
                                 "stage's best validated ones) instead of the dynamics stage's last step")
    # 0.1 and fresh moments since the twenty-ninth session: before, the joint stage's first validation read
    # 1.3-3x the dynamics stage's last (full bench 3.6e-4 -> 1.15e-3; pendulum classic s11 4.1e-4 ->
    # 6.6e-4, never back); with both it read equal or better in ten runs of eleven; the end results of
    # three paired step-budget runs differed by no more than a seed's spread (DEVELOPERS.md)
    joint_warmup: float = _opt(0.1, "staged: share of the joint stage over which its learning rate rises linearly "
                               "from 0 to train.joint_lr; 0 = it starts at the peak", lo=0.0, hi=1.0)
    joint_fresh_moments: bool = _opt(True, "staged: the optimiser forgets its running gradient statistics of the "
                                     "position encoder and decoder when the joint stage starts (they date from "
                                     "the positions stage's loss and learning rate)")
    keypoint_repulsion: float = _opt(0.0, "staged: weight of a term that keeps keypoints apart in the positions "
                                     "stage (for several similar objects)", lo=0.0)
    # 1.0: on the air table the two keypoints then sat one on each puck (within ~0.5 px on held-out
    # trials) where without it both found the same puck; pendulum 1.02 -> 0.79 px @60, spring
    # 0.65 -> 0.29x the background's MSE (bench/recipe.py, seed 0, one run each)
    keypoint_coverage: float = _opt(1.0, "staged: weight of a term that puts a keypoint near every part of "
                                    "the frame that differs from the background, in the positions stage "
                                    "(one keypoint per object when there are several)", lo=0.0)
    # 1e-3: the autoencoder's per-pixel NLL moves by ~1e-4 with the object's position, and one heat map
    # sharpened into a single cell costs KL ≈ 20-60 nats, so the term outweighs the position signal
    # only when a map saturates; a one-cell-wide bump costs nothing whatever its position
    heat_map_shape: float = _opt(1e-3, "staged, keypoint encoder: weight of a term that keeps each heat map a "
                                 "bump about one cell wide once the object is found, so keypoint positions "
                                 "move smoothly between cells instead of snapping to them; 0 = off", lo=0.0)
    # 16: enough draws for the 90 % quantile of each frame's spread to be stable to ~10 %, at a cost
    # of a second or two after training (latent rollouts only, nothing decoded)
    calibration_samples: int = _opt(16, "futures drawn on each validation trial after training to fit the "
                                    "spread scale of sampled futures (the truth inside their central "
                                    "score.band region as often as the band says); 0 = no scale", lo=0, hi=1000)
    # 0.8: a fit below it came from a few held-out trials that happened to be easy. Of 69 pendulum and
    # spring runs of the recipe bench (defaults 17-20) scored on 12 unseen trials, the 9 whose fit came
    # out below 1 (scale 0.39-0.97, under the region of those runs: the plain 0.9 quantile of 16
    # futures' distances) covered a median 0.85 of positions, 6 of them below 0.85; the 60 at or above
    # it, a median 0.90 (40 within 0.85-0.95). Since the twenty-fifth session the region is corrected
    # for the number of futures (calibration.disc_radius), ~1.23x wider per unit scale at 16 futures,
    # so that floor reads 1 / 1.23 = 0.81 now. A floor of 1 (the posterior's own region) kept one
    # stored pendulum run at 0.98 coverage where its held-out fit, 0.76, covered 0.91 (0.93 at 0.8)
    spread_floor: float = _opt(0.8, "smallest spread scale kept after training: the fits on a few trials "
                               "may widen the sampled futures' own spread, but not shrink it below this "
                               "share of it; 0 = keep what the fits say", lo=0.0, hi=1000.0)
    still_keypoint_px: float = _opt(1.0, "staged, keypoint encoder: a keypoint whose encoded position moves by "
                                    "less than this (rms over the training frames, model pixels) when the "
                                    "dynamics stage starts is held still by the field (e.g. one parked on a "
                                    "fixed part); 0 = off", lo=0.0)
    positions_kl: float = _opt(0.1, "staged: KL weight reached by the end of the positions stage", lo=0.0)
    escape_deadline: float = _opt(0.4, "staged: share of the positions stage after which an attempt that has "
                                  "found nothing (error still >= 0.8x the background's) restarts from a new seed", lo=0.05, hi=1.0)
    dynamics_window: int = _opt(0, "staged: longest window of the dynamics stage in frames; 0 = 2 periods "
                                "of the tracked object, at least 20 frames (20 when no period is found; "
                                "capped by the recordings)",
                                lo=0)
    velocity_aux: float = _opt(1.0, "staged: weight of the finite-difference velocity term of the dynamics "
                               "stage", lo=0.0)
    # 2 px: offline, the dynamics stage alone for 75 s on a frozen encoder (bench/field_offline.py,
    # one seed each), held-out keypoint error @60: ball 2.39 px -> 2.31 with 60-frame windows,
    # 2.42 -> 1.73 with two-period (36-frame) windows; spring 0.66 -> 0.53 (60), 0.59 -> 0.54 (49);
    # pendulum textured 2.37 -> 1.08 (66)
    dynamics_robust_px: float = _opt(2.0, "staged: in the dynamics stage, errors beyond this many model pixels "
                                     "count linearly, not squared (Huber), so a bounce a frame off does not "
                                     "drown the smaller errors; 0 = squared throughout", lo=0.0)
    # 1 (the ELBO): on the ball rig, s2, 60-frame dynamics windows, 0.01 and 0.1 gave 3.70 px @60 each
    # against 4.29 with 1 on the same day (3.68 the day before); s3 at 0.01 3.78 vs 3.62; one run each:
    # no gain beyond run-to-run spread (bench/recipe.py)
    dynamics_weight_kl: float = _opt(1.0, "staged: weight of the field's weight KL in the dynamics stage "
                                     "(1 = the ELBO; below 1 a tempered posterior: a large field fitted to "
                                     "few encoded frames is otherwise held near its prior)", lo=0.0)
    lr: float = _opt(3e-3, "peak learning rate", lo=0.0)
    lr_min_ratio: float = _opt(0.05, "final learning rate as a fraction of the peak", lo=0.0, hi=1.0)
    warmup_steps: int = _opt(50, "linear learning-rate warm-up steps", lo=0)
    kl_warmup: float = _opt(0.2, "share of the budget over which the KL weight rises from 0 to 1",
                            lo=0.0, hi=1.0)
    grad_clip: float = _opt(1.0, "gradient norm clip; 0 = off", lo=0.0)
    window_start: int = _opt(8, "first curriculum window length in frames", lo=2)
    # 20 frames: the bench protocol (pendulum 3W MSE 0.09x persistence in 5 min). With 64 and
    # window_schedule 0.3, a 4-minute 64 px run made only ~300 steps (a 64-frame step is ~4x dearer)
    # and forecast worse; raise it for long forecasts when the budget allows.
    window_max: int = _opt(20, "longest training window in frames (also capped by the shortest training "
                           "recording); 0 = no cap beyond the recordings", lo=0)
    decode_frames: int = _opt(0, "frames per window decoded and scored each step (drawn at random; an "
                               "unbiased estimate); 0 = all", lo=0)
    # 20 keeps every frame of a 20-frame window; at 64-frame windows it bounds the extra peak memory
    # of the agreement term (measured at 64 px, batch 8: all 63 frames +0.40 GB over no agreement)
    agreement_frames: int = _opt(20, "at most this many frames per window enter the agreement term "
                                 "(drawn at random; an unbiased estimate); 0 = all", lo=0)
    window_growth: float = _opt(1.5, "window × this when validation stalls", lo=1.0)
    # 0.3: on the pendulum bench set (5 min, W = 20, agreement 3) the 3W forecast MSE went from
    # 0.21-0.22x persistence with 0.6 to 0.11x: more of the budget is spent on full-length windows
    window_schedule: float = _opt(0.3, "share of the budget by which the window has grown (geometrically) "
                                  "to its longest at the latest; 0 = grow only when validation stalls",
                                  lo=0.0, hi=1.0)
    val_every: int = _opt(50, "steps between validations", lo=1)
    # 0.98 (an average over about the last 50 steps): offline, the dynamics stage alone for 75 s on
    # the frozen encoders of eight stored recipe-bench runs, the average's held-out keypoint error
    # @60 was up to 3x below the raw weights' through the stage's first half (pendulum gradient 0.46
    # against 1.52 px at 35 s) and no worse at its end; in ten 5-minute recipe-bench runs (with
    # joint_from_best) the pendulum reached 0.1x persistence in 92-103 s against 119-159 s in the
    # d19/d20 runs of the same seeds (DEVELOPERS.md, twenty-eighth session)
    weight_average: float = _opt(0.98, "decay per step of a moving average of the weights, kept from the "
                                 "dynamics stage on (the whole run for end_to_end); validation, the kept "
                                 "weights and so forecasts use the average, training goes on from the raw "
                                 "weights; 0 = off", lo=0.0, hi=0.9999)
    val_fraction: float = _opt(0.25, "tail share of a single recording held out for validation",
                               lo=0.0, hi=0.9)
    patience: int = _opt(6, "validations without improvement before growing the window / stopping", lo=1)
    early_stop: bool = _opt(True, "end the run when validation has stalled at the longest window; an extension "
                            "asked for with fit --resume --budget/--steps turns it off, so that it trains as "
                            "long as asked (the weights kept are still the best validated)")
    # 0.7: the early stops of the 5-minute recipe-bench runs (defaults 14-19) came at 183-317 s (0.6-1.0
    # of the budget) and succeeded as often as runs that used the whole budget; with faster steps
    # (train.keep_heap) the full bench's spring fit stopped at 180 s, 24 s into its joint stage, and
    # forecast worse (0.35x persistence against 0.20-0.22x). Counting patience in validations ties the
    # stop to the machine's speed; a share of the budget does not (DEVELOPERS.md, twenty-third session)
    early_stop_from: float = _opt(0.7, "share of the budget that must have passed before early stop may end the "
                                  "run (a stall before it does not end the run; a later improvement clears it)",
                                  lo=0.0, hi=1.0)
    checkpoint_every: int = _opt(100, "steps between checkpoints", lo=1)
    threads: int = _opt(0, "torch threads; 0 = the core count", lo=0)
    device: str = _opt("auto", "compute device", choices=("auto", "cpu", "cuda"))
    # auto: bf16 conv nets made the joint stage ~1.9x faster (measured with the keypoint encoder in bf16 too;
    # its heat maps now stay float32 (model.keypoint_trunk_low_precision), and the 4-minute demo fit
    # made 2262 steps with defaults 12 against 2270 with defaults 9 in fp32); with the rest of
    # defaults 12 all 20 pendulum and spring runs succeeded. With the keypoint
    # encoder in bf16 too it lost two spring runs (seed 5 classic 0.95 -> 2.23 px, drift + noise
    # 1.52 -> 2.10 px; bench/results/recipe_runs.jsonl, "precision" field; DEVELOPERS.md)
    precision: str = _opt("auto", "number format of the conv nets (training, forecasts and scores): fp32; bf16 "
                          "(faster where the CPU or GPU has native bfloat16; refused where not); auto = bf16 "
                          "where native (checked at run time), fp32 otherwise. Weights and everything else "
                          "(and the keypoint encoder's heat maps) stay float32", choices=("auto", "fp32", "bf16"))
    # True since the twenty-third session, with early stop from train.early_stop_from: 9 paired 5-minute
    # recipe-bench runs (every rig kind, five looks, both scenes drawn by other code) against the
    # twenty-first session's d19 runs: successes 5 -> 6 of 9, position error better on 5 and worse on 4
    # (median -0.01 px), joint-stage steps per second 5.1-7.9 -> 6.4-7.4. Without the floor (twenty-second
    # session) the faster steps stopped fits as early as 180 s of 300 and the forecasts leaned worse
    keep_heap: bool = _opt(True, "keep large freed memory blocks in the process for the next step (glibc's "
                           "malloc; no effect elsewhere) instead of fresh pages from the system every step: "
                           "faster steps, the same arithmetic (kinecast.heap)")
    max_faults: int = _opt(5, "non-finite losses tolerated (each rolls back) before stopping", lo=0)


@dataclass
class ForecastConfig:
    """Rollout and rendering."""

    frames: int = _opt(30, "frames to forecast", lo=1)
    samples: int = _opt(1, "futures drawn (encoder noise and weight draws); 1 = mean weights", lo=1, hi=1000)
    # TOML integers are signed 64-bit (TOML 1.0.0), the largest seed a config file can hold
    seed: int = _opt(0, "seed of the random draws behind sampled futures (forecast, score with samples > 1): "
                     "the same seed, run, recording and device give the same samples", lo=0, hi=2**63 - 1)
    fps: float = _opt(0.0, "forecast frames per second of recording time (the clip plays at the recording's "
                      "rate, so 4x the recording's gives 4x slow motion); 0 = the recording's", lo=0.0)
    upscale: int = _opt(4, "pixel upscaling of rendered clips", lo=1, hi=16)
    contact_every: int = _opt(5, "every n-th frame on the contact sheet", lo=1)


@dataclass
class ScoreConfig:
    """Per-frame metrics against held-out frames."""

    holdout: str = _opt("last:30", "held-out frames: last:N or trial:NAME")
    context: int = _opt(3, "conditioning frames before the held-out stretch", lo=2)
    ssim_threshold: float = _opt(0.8, "valid horizon ends where SSIM drops below this", lo=0.0, hi=1.0)
    band: float = _opt(0.9, "central probability band for the calibration check", lo=0.0, hi=1.0)
    ssim_window: int = _opt(7, "SSIM Gaussian-free square window (odd)", lo=3, hi=31)
    # 2 px at 64 px is about half the radius of the rigs' objects (pendulum bob 3.7 px, pucks about
    # 3 px): within it the forecast object still covers most of the true one. Scale it with data.size.
    position_threshold_px: float = _opt(2.0, "object valid horizon ends where the object position error "
                                        "first exceeds this (model pixels)", lo=0.0)


@dataclass
class Config:
    """The whole configuration; one section per stage of the data path."""

    data: DataConfig = field(default_factory=DataConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    solver: SolverConfig = field(default_factory=SolverConfig)
    train: TrainConfig = field(default_factory=TrainConfig)
    forecast: ForecastConfig = field(default_factory=ForecastConfig)
    score: ScoreConfig = field(default_factory=ScoreConfig)


SECTIONS = tuple(f.name for f in fields(Config))

# A forecast clearly draws the object only when its MSE is below this × that of the bare background
# (the verdict's floor; training never early-stops above it). Not merely below 1: a forecast of the
# blurred mean of the motion (a model that learned nothing) already scores a little under the
# background, because the temporal mean is the best constant predictor under squared error (least
# squares). Our choice from measured 5-minute fits at 64 px: runs that had not found the object
# scored 0.93-1.11× the background (pendulum, air table), runs that track it 0.46-0.59× (pendulum,
# spring).
FLOOR_MARGIN = 0.8
_NUMBER = r"(\d+(?:\.\d+)?)"
_UNIT_END = r"(?![a-z])"  # a unit word ends here ("5min" is minutes, not "5m" followed by "in")
# hours, minutes, seconds in that order, each optional, spaces allowed: 90s, 5 min, 1h30m, 1 h 30 min
_BUDGET = re.compile(rf"^(?:{_NUMBER}\s*(?:h|hr|hrs|hours?){_UNIT_END})?\s*"
                     rf"(?:{_NUMBER}\s*(?:m|min|mins|minutes?){_UNIT_END})?\s*"
                     rf"(?:{_NUMBER}\s*(?:s|sec|secs|seconds?){_UNIT_END})?$")
_BUDGET_FORMS = "a duration like 90s, 5m, 5min, 5 min, 300s, 1h or 1h30m, or 0 for none"


def parse_budget(text: str, key: str = "train.budget") -> float:
    """Seconds in a budget like ``90s``, ``5m``, ``5 min``, ``1h30m``; ``0`` means no budget.

    A bare number other than 0 is refused: it has no unit (it once meant seconds, which surprised
    users who meant minutes).

    >>> parse_budget("1h30m")
    5400.0
    """
    if not isinstance(text, str):  # a TOML number (budget = 5): the unit is missing
        raise KinecastError(key, f"bad value {text!r}: a number has no unit; write {_BUDGET_FORMS} "
                                 "(in quotes in a TOML file)")
    s = text.strip().lower()
    if re.fullmatch(_NUMBER, s):
        if float(s) == 0:
            return 0.0
        raise KinecastError(key, f"bad value {text!r}: a bare number has no unit; write {_BUDGET_FORMS}")
    m = _BUDGET.match(s)
    if not s or not m or not any(m.groups()):
        raise KinecastError(key, f"bad value {text!r}: allowed {_BUDGET_FORMS}")
    h, mi, se = (float(g) if g else 0.0 for g in m.groups())
    return h * 3600 + mi * 60 + se


def _check(section: str, f: dataclasses.Field, value: Any) -> Any:
    """Coerce ``value`` to the field's type and check its range; raise naming key and allowed values."""
    key = f"{section}.{f.name}"
    meta = f.metadata
    kind = type(f.default) if f.default is not dataclasses.MISSING else list

    def bad(allowed: str):
        return KinecastError(key, f"bad value {value!r}: allowed {allowed}")

    if kind is bool:
        if not isinstance(value, bool):
            raise bad("true or false")
    elif kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad("a whole number")
    elif kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise bad("a finite number")
        value = float(value)
    elif kind is str:
        if key == "train.budget":
            parse_budget(value, key)  # its own message: a bare number is refused naming the forms
        if key == "model.field_per_keypoint" and isinstance(value, bool):
            value = "on" if value else "off"  # run folders written before 2026-12-03 hold true / false
        if not isinstance(value, str):
            raise bad("a string")
    elif kind is list:
        if not isinstance(value, list) or not all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            raise bad("a list of numbers")
        if meta.get("length") and len(value) not in meta["length"]:
            raise bad(f"a list of {' or '.join(map(str, meta['length']))} numbers")
        value = list(value)
    if meta.get("choices") and value not in meta["choices"]:
        raise bad("one of " + ", ".join(map(str, meta["choices"])))
    lo, hi = meta.get("lo"), meta.get("hi")
    if kind in (int, float) and ((lo is not None and value < lo) or (hi is not None and value > hi)):
        rng = f"from {lo} to {hi}" if hi is not None else f"at least {lo}"
        raise bad(f"a number {rng}")
    if key == "score.holdout" and not re.match(r"^(last:\d+|trial:.+)$", value):
        raise bad("last:N or trial:NAME")
    return value


def from_dict(tree: dict, base: Config | None = None, source: str = "config") -> Config:
    """Build a validated :class:`Config` from nested dicts, starting from ``base`` (default values)."""
    cfg = _copy(base) if base else Config()
    if not isinstance(tree, dict):
        raise KinecastError(source, "expected a table of sections")
    for section, values in tree.items():
        if section not in SECTIONS:
            raise KinecastError(source, f"unknown section [{section}]{did_you_mean(section, SECTIONS)}: "
                                        f"allowed {', '.join(SECTIONS)}")
        if not isinstance(values, dict):
            raise KinecastError(f"{source}: {section}", "expected a table of keys")
        sub = getattr(cfg, section)
        known = {f.name: f for f in fields(sub)}
        for key, value in values.items():
            if key not in known:
                every = [f"{s}.{f.name}" for s in SECTIONS for f in fields(getattr(cfg, s))]
                raise KinecastError(f"{section}.{key}", f"unknown key in {source}"
                                    f"{did_you_mean(f'{section}.{key}', every)}: allowed {', '.join(known)}")
            setattr(sub, key, _check(section, known[key], value))
    return cfg


def _copy(cfg: Config) -> Config:
    return Config(**{s: dataclasses.replace(getattr(cfg, s)) for s in SECTIONS})


def to_dict(cfg: Config) -> dict:
    """Nested plain dicts of the config (lists copied)."""
    return dataclasses.asdict(cfg)


# Keys added after run folders were first written, with the value that reproduces the runs written
# before them: a run's config.toml without the key is read with that value, not today's default.
# (field_per_keypoint: runs from before the key had one field over all coordinates; unresolved "auto"
# would build that too, but only by accident of LatentODE testing for "on")
SAVED_RUN_ABSENT = {("model", "keypoint_window"): 0, ("model", "field_per_keypoint"): "off",
                    ("model", "keypoint_trunk_low_precision"): False, ("train", "weight_average"): 0.0,
                    ("train", "joint_from_best"): False, ("train", "joint_warmup"): 0.0,
                    ("train", "joint_fresh_moments"): False}


def saved_run_base() -> Config:
    """Defaults for reading a run folder's config.toml (:data:`SAVED_RUN_ABSENT` applied)."""
    cfg = Config()
    for (section, key), value in SAVED_RUN_ABSENT.items():
        setattr(getattr(cfg, section), key, value)
    return cfg


def load(path: str | Path, base: Config | None = None) -> Config:
    """Read a TOML config file; missing keys keep the values of ``base`` (default: defaults)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise KinecastError(path, "config file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise KinecastError(path, f"cannot read config ({exc})") from None
    return from_toml_text(text, base, source=str(path))


def from_toml_text(text: str, base: Config | None = None, source: str = "config") -> Config:
    """Parse TOML text into a validated :class:`Config`."""
    try:
        tree = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise KinecastError(source, f"not valid TOML ({exc})") from None
    return from_dict(tree, base, source)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def to_toml_text(cfg: Config) -> str:
    """The config as TOML text, one table per section, every key written."""
    lines = ["# kinecast configuration (every key; see `kinecast config --keys`)"]
    for section in SECTIONS:
        lines += ["", f"[{section}]"]
        for f in fields(getattr(cfg, section)):
            lines.append(f"{f.name} = {_toml_value(getattr(getattr(cfg, section), f.name))}")
    return "\n".join(lines) + "\n"


def save(cfg: Config, path: str | Path, overwrite: bool = True) -> Path:
    """Write the config as TOML atomically."""
    from .fileio import write_text

    return write_text(path, to_toml_text(cfg), overwrite)


def _parse_override_value(raw: str) -> Any:
    """A ``--set`` value: TOML syntax where it parses (numbers, booleans, lists), else a bare string."""
    try:
        return tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        return raw


def apply_overrides(cfg: Config, overrides: list[str] | tuple[str, ...]) -> Config:
    """Apply ``section.key=value`` overrides; each is validated like a TOML key."""
    tree: dict[str, dict[str, Any]] = {}
    for item in overrides or ():
        key, sep, raw = item.partition("=")
        section, dot, name = key.strip().partition(".")
        if not sep or not dot or not name:
            names = {f.name: f"{s}.{f.name}" for s in SECTIONS for f in fields(getattr(Config(), s))}
            close = closest(key.strip(), names)  # e.g. hidden=3 -> model.hidden=3
            hint = f" (did you mean {names[close]}={raw.strip()}?)" if close and sep else ""
            raise KinecastError(f"--set {item}", f"expected section.key=value{hint}")
        value = _parse_override_value(raw.strip())
        sub = getattr(Config(), section, None)
        if isinstance(getattr(sub, name, None), str) and not isinstance(value, str):
            value = raw.strip()  # a string key given a bare number, e.g. train.budget=0
        tree.setdefault(section, {})[name] = value
    return from_dict(tree, cfg, source="--set")


def with_values(cfg: Config, values: dict[str, Any], source: str = "options") -> Config:
    """``cfg`` with ``{"section.key": value}`` set (None: left as it is), each value validated like a
    TOML key: how a verb's own flags (``--budget``, ``--seed`` ...) reach the config."""
    tree: dict[str, dict[str, Any]] = {}
    for key, value in values.items():
        if value is not None:
            section, _, name = key.partition(".")
            tree.setdefault(section, {})[name] = value
    return from_dict(tree, cfg, source)


def help_keys() -> str:
    """One line per key: name, default, allowed values and help."""
    out = []
    base = Config()
    for section in SECTIONS:
        for f in fields(getattr(base, section)):
            meta = f.metadata
            allowed = ""
            if meta.get("choices"):
                allowed = f" ({'|'.join(meta['choices'])})"
            out.append(f"{section}.{f.name} = {_toml_value(getattr(getattr(base, section), f.name))}"
                       f"{allowed}  # {meta['help']}")
    return "\n".join(out)
