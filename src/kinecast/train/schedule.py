"""Schedules: learning rate, KL weight and the window curriculum.

All three follow ``progress`` in [0, 1]: the larger of steps done / step budget and seconds spent /
wall-clock budget, so a run shaped by either budget gets the whole schedule.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..config import FLOOR_MARGIN, TrainConfig
from .stages import DYNAMICS, JOINT, POSITIONS


def progress(step: int, elapsed: float, steps: int, budget_s: float) -> float:
    parts = []
    if steps:
        parts.append(step / steps)
    if budget_s:
        parts.append(elapsed / budget_s)
    return min(1.0, max(parts)) if parts else 0.0


def may_stop_early(best: float, background: float, prog: float, cfg: TrainConfig) -> bool:
    """Whether a stall at the longest window may end the run.

    Not before ``early_stop_from`` of the budget (so the stop does not follow the machine's speed: a
    faster step reaches the same count of stalled validations sooner), and never while the best score
    does not clearly beat drawing the bare background (``FLOOR_MARGIN``, the verdict's floor: a model
    that draws the mean frame scores just under the background, 0.99x measured).
    """
    return prog >= cfg.early_stop_from and best < FLOOR_MARGIN * background


def learning_rate(cfg: TrainConfig, step: int, prog: float, scale: float = 1.0) -> float:
    """Linear warm-up over ``warmup_steps``, then cosine decay to ``lr_min_ratio`` × peak.

    ``scale`` < 1 after numerical faults (each fault halves it).
    """
    peak = cfg.lr * scale
    if step < cfg.warmup_steps:
        return peak * (step + 1) / cfg.warmup_steps
    floor = cfg.lr_min_ratio
    return peak * (floor + (1 - floor) * 0.5 * (1 + math.cos(math.pi * prog)))


def stage_learning_rate(cfg: TrainConfig, step: int, stage: str, local: float, scale: float = 1.0) -> float:
    """:func:`learning_rate` at progress ``local`` within ``stage``, scaled to the stage's own peak.

    The staged recipe's positions stage peaks at ``positions_lr``, its joint stage at ``joint_lr``
    (reached linearly over the first ``joint_warmup`` of the stage), its dynamics stage and the
    ``end_to_end`` recipe (one stage, ``"joint"``, ``local`` = overall progress) at ``lr``.
    """
    lr = learning_rate(cfg, step, local, scale)
    if cfg.recipe != "staged" or stage == DYNAMICS:
        return lr
    peak = cfg.positions_lr if stage == POSITIONS else cfg.joint_lr
    lr *= peak / cfg.lr if cfg.lr > 0 else 0.0
    if stage == JOINT and cfg.joint_warmup > 0:
        lr *= min(1.0, local / cfg.joint_warmup)
    return lr


def kl_weight(cfg: TrainConfig, prog: float) -> float:
    """β rises linearly from 0 to 1 over the first ``kl_warmup`` share of the budget."""
    if cfg.kl_warmup <= 0:
        return 1.0
    return min(1.0, prog / cfg.kl_warmup)


@dataclass
class Curriculum:
    """Grow the window when validation stalls; mark the run ``done`` when it stalls at the longest
    window (until a later score improves; :func:`may_stop_early` says whether it may end yet).

    Validation always scores the same long forecast horizon, so scores stay comparable as the
    training window grows and the best one marks the checkpoint to keep.

    ``best`` is the best score of all (it decides which weights are kept); ``trend_best`` the best
    of the scores that count stalls (the staged recipe's joint stage: a dynamics-stage score kept as
    the best does not make the joint stage's first validations read as stalls). Attributes are
    plain numbers so the state is saved with a checkpoint and restored on resume.
    """

    window: int
    longest: int
    growth: float
    patience: int
    best: float = math.inf
    stalls: int = 0
    done: bool = False
    trend_best: float = math.inf

    def follow(self, start: int, prog: float, schedule: float) -> None:
        """Never lag behind geometric growth from ``start`` to ``longest`` over ``schedule`` of the budget.

        A wall-clock budget may end before validation stalls often enough to grow the window; the
        schedule makes sure long windows (needed for long extrapolation) are trained in any case.
        """
        if schedule > 0 and self.longest > start:
            floor = start * (self.longest / start) ** min(1.0, prog / schedule)
            self.window = max(self.window, min(self.longest, int(floor)))

    def update(self, val: float, stalls: bool = True) -> bool:
        """Record a validation score; return True when it is the best so far. ``stalls=False``: the
        score only competes for the best (it neither grows the window nor ends the run; the staged
        recipe's dynamics stage, whose windows are not this curriculum's)."""
        improved = val < self.best * (1 - 1e-3)
        if improved:
            self.best = val
        if not stalls:
            return improved
        if val < self.trend_best * (1 - 1e-3):
            self.trend_best, self.stalls, self.done = val, 0, False
            return improved
        self.stalls += 1
        if self.stalls >= self.patience:
            self.stalls = 0
            if self.window >= self.longest:
                self.done = True
            else:
                self.window = min(self.longest, max(self.window + 1, int(round(self.window * self.growth))))
        return improved

    def state(self) -> dict:
        return {k: getattr(self, k) for k in ("window", "longest", "growth", "patience", "best", "stalls", "done",
                                              "trend_best")}
