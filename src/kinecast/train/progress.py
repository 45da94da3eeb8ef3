"""What a person watching ``kinecast fit`` sees: live progress, notes, and the untrained warning.

On a terminal one line is redrawn in place; in a log file or a pipe a plain line is written every
:data:`PLAIN_EVERY_S` seconds, at every stage change and at every validation, so a run never looks
hung. Each line says how far the run is (time and steps against the budget), how fast it goes, which
stage of the recipe it is in, the window it trains on and the latest validation error next to the
bare background's.
"""

from __future__ import annotations

import math
import shutil
import sys
import time

from . import stages as S

REDRAW_S = 0.5  # terminal: redraw the live line at most this often (smooth, no flicker)
PLAIN_EVERY_S = 10.0  # log file or pipe: a plain line at least this often, so a run never looks hung
STAGE_WORDS = {S.POSITIONS: "finding and drawing the moving object", S.DYNAMICS: "learning the motion",
               S.JOINT: "refining both together"}


def duration(seconds: float, decimals: int = 0) -> str:
    """A duration as ``1h05m``, ``4m10s`` or ``12s``; also a valid ``train.budget`` value.

    ``decimals`` keeps fractions of a second (``12.5s``) where the exact value matters.

    >>> duration(5400), duration(250), duration(12.46, 1)
    ('1h30m', '4m10s', '12.5s')
    """
    seconds = round(max(0.0, seconds), decimals)
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    sec = f"{s:.{decimals}f}s" if decimals else f"{int(s)}s"
    if h:
        return f"{int(h)}h{int(m):02d}m" + (sec if s else "")
    if m:
        return f"{int(m)}m" + (sec if s else "")
    return sec


def _rate(steps: int, seconds: float) -> str:
    if seconds <= 0 or steps <= 0:
        return "measuring speed"
    per_s = steps / seconds
    return f"{per_s:.1f} steps per second" if per_s >= 1 else f"{seconds / steps:.1f} seconds per step"


class Progress:
    """Live progress of one training run.

    Parameters
    ----------
    steps_total, budget_s : int, float
        The run's step and wall-clock budgets (0 = none), counted from the run's start.
    step, elapsed : int, float
        Where the run starts (non-zero when resumed).
    recipe : str
        ``train.recipe`` (the staged recipe has three stages; end_to_end has one).
    enabled : bool
        False writes no progress lines (notes are still written).
    stream : file, optional
        Where lines go (default: standard error).
    """

    def __init__(self, steps_total: int, budget_s: float, step: int, elapsed: float, recipe: str,
                 enabled: bool = True, stream=None):
        self.steps_total, self.budget_s, self.recipe = steps_total, budget_s, recipe
        self.start_step, self.start_elapsed = step, elapsed
        self.enabled = enabled
        self.stream = stream if stream is not None else sys.stderr
        isatty = getattr(self.stream, "isatty", None)
        self.live = bool(isatty and isatty())
        self.last_shown = -math.inf
        self.shown = ""  # the live line now on screen (terminal only)
        self.state: tuple | None = None
        self.pending = False  # write the next update whatever the time (set at a stage change)
        self.written_step = -1  # step of the last line written

    # --- the line -----------------------------------------------------------------------------
    def line(self, step: int, elapsed: float, stage: str | None, window: int, val: float,
             bg_val: float = math.nan, short: bool = False) -> str:
        """One progress line in plain words; ``short`` puts the most telling parts first for a
        terminal row (the end of it may be cut off on a narrow terminal)."""
        done, took = step - self.start_step, elapsed - self.start_elapsed
        left = self._left(step, elapsed, done, took)
        total = []  # how far, against each budget there is
        if self.steps_total:
            total.append(f"step {step} of {self.steps_total} ({100 * step / self.steps_total:.0f} %)")
        if self.budget_s:
            total.append(f"{duration(elapsed)} of {duration(self.budget_s)} "
                         f"({100 * min(1.0, elapsed / self.budget_s):.0f} %)")
        counts = [] if self.steps_total else [f"step {step}"]
        counts.append(_rate(done, took))
        if not self.budget_s:
            counts.insert(0, f"{duration(elapsed)} elapsed")
        if left is not None and not (short and self.budget_s):  # short: "x of y" tells what is left
            counts.append(f"about {duration(left)} left")
        if stage is None:
            where = []
        elif self.recipe == "staged":
            where = [f"stage {S.NUMBER[stage]} of 3 ({stage}" + (")" if short else f": {STAGE_WORDS[stage]})")]
        else:
            where = ["end-to-end training"]
        where.append(f"windows of {window} frames")
        if math.isfinite(val):
            bg = f" (bare background {bg_val:.3g})" if math.isfinite(bg_val) and not short else ""
            score = [f"validation error {val:.3g}{bg}"]
        else:
            # the staged recipe validates from the dynamics stage on (loop._validate_and_save)
            later = " (it starts in stage 2)" if self.recipe == "staged" and stage == S.POSITIONS and not short else ""
            score = ["no validation yet" + later]
        if short:
            return ", ".join(total + where[:1] + counts + score + where[1:])
        return "training: " + ", ".join(total + counts + where + score)

    def _left(self, step: int, elapsed: float, done: int, took: float) -> float | None:
        lefts = []
        if self.budget_s:
            lefts.append(max(0.0, self.budget_s - elapsed))
        if self.steps_total and done > 0 and took > 0:
            lefts.append(max(0, self.steps_total - step) * took / done)
        return min(lefts) if lefts else None

    # --- output -------------------------------------------------------------------------------
    def update(self, step: int, elapsed: float, stage: str | None, window: int, val: float,
               bg_val: float = math.nan, event: bool = False) -> None:
        """Show progress; ``event`` (a validation) always writes a line, also to a file."""
        if not self.enabled:
            return
        self.state = (step, elapsed, stage, window, val, bg_val)
        now = time.monotonic()
        due = now - self.last_shown >= (REDRAW_S if self.live else PLAIN_EVERY_S)
        if not (due or event or self.pending):
            return
        self.last_shown, self.pending, self.written_step = now, False, step
        if self.live:
            self._draw(self.line(*self.state, short=True))
        else:
            self._write(f"kinecast: {self.line(*self.state)}")

    def soon(self) -> None:
        """Write the next update whatever the time (after a stage change: its first step's line)."""
        self.pending = True

    def note(self, text: str) -> None:
        """A message (a warning, a restart) written on its own line, above the live line."""
        if self.live and self.shown:
            self._clear()
            self._write(text)
            self._draw(self.shown)
        else:
            self._write(text)

    def close(self) -> None:
        """Show the final state and leave the cursor on a fresh line."""
        if self.enabled and self.state is not None and self.state[0] != self.written_step:
            self.update(*self.state, event=True)
        if self.live and self.shown:
            self.stream.write("\n")
            self.stream.flush()
            self.shown = ""

    def _write(self, text: str) -> None:
        self.stream.write(text + "\n")
        self.stream.flush()

    def _draw(self, text: str) -> None:
        width = max(20, shutil.get_terminal_size().columns - 1)  # never wrap: "\r" redraws one row
        text = text if len(text) <= width else text[:width - 3] + "..."
        self.stream.write("\r" + text.ljust(len(self.shown)))
        self.stream.flush()
        self.shown = text

    def _clear(self) -> None:
        self.stream.write("\r" + " " * len(self.shown) + "\r")


def untrained_reason(recipe: str, steps: int, positions_found, best_val: float, background_val: float) -> str | None:
    """Why a finished run's model has learned nothing usable, or None when it has.

    Two signs: the staged recipe's position encoder never found the moving object, or the kept
    weights forecast no better than drawing the bare background (a model that draws nothing).
    """
    if recipe == "staged" and positions_found is False:
        return f"the position encoder never found the moving object in {steps} steps"
    if math.isfinite(best_val) and math.isfinite(background_val) and not best_val < background_val:
        return (f"its forecasts are no better than the bare background (validation error "
                f"{best_val:.3g} against {background_val:.3g})")
    return None


# Held-out trials at or below which fit says its spread scale is a rough one. Our measurement
# (DEVELOPERS.md, twenty-sixth session): on nine stored 5-minute runs, a fit on 2 held-out trials
# came within ±20 % of the scale that 12 new trials of the same scene ask for in about half of the
# cases (the scale two trials asked for spanned 0.42-3.59 on one run whose 12 trials asked for
# 2.15); more futures per trial or more clips per trial did not narrow that. More held-out trials
# narrow it slowly (twenty-seventh session, same runs, groups of other trials): within ±20 % in 50 /
# 53 / 57 / 58 % of the cases with 2 / 3 / 4 / 6 trials, but the fits over 30 % too small — futures
# more confident than they should be — fell from 15 % with 2 to 8 % with 3 (6 % with 6): the step
# this threshold marks.
FEW_CALIBRATION_TRIALS = 2


def spread_line(summary: dict, band: float) -> str:
    """The line ``fit`` prints (and the report shows) about the spread scale of sampled futures,
    from a run's ``summary`` (see :func:`kinecast.train.loop.calibrate_run`)."""
    fits = summary.get("spread_scale_candidates") or {}
    where = summary.get("spread_scale_from") or "held-out trials"
    applies = "applies to forecast/score with --samples > 1"
    if where not in fits:  # the floor, not a fit, set it
        said = ", ".join(f"{value:.3g} on the {name}" for name, value in fits.items())
        return (f"sampled futures: spread scaled by {summary['spread_scale']:.3g}, the {where}; the fits "
                f"({said}) would have narrowed it further, more than a fit on a few trials is trusted to; "
                f"{applies}{_few_trials(summary)}")
    both = ", the larger of the held-out and training trials' fits" if len(fits) > 1 else ""
    return (f"sampled futures: spread scaled by {summary['spread_scale']:.3g} (fitted on the {where}{both}, "
            f"so that {100 * band:.0f} % of their true object positions (tracked in the frames) fall inside "
            f"the futures' central region; {applies}){_few_trials(summary)}")


def _few_trials(summary: dict) -> str:
    """A caution for :func:`spread_line` when the scale rests on few held-out trials ('' otherwise)."""
    held = summary.get("val_recordings")
    if not held or held > FEW_CALIBRATION_TRIALS:
        return ""
    if summary.get("validated_on") == summary.get("trained_on"):  # the tail of a single recording
        what = "the held-out tail of one recording"
    else:
        what = "one held-out trial" if held == 1 else f"{held} held-out trials"
    return (f". With {what} the scale is rough: on new recordings the share of true positions inside "
            "the region may land well off the nominal one (give more trials: a quarter of them are held "
            "out, train.val_fraction)")
