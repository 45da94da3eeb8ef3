"""The training loop: one function, readable top to bottom.

``fit(paths, out, cfg)`` reads the recordings, splits off validation, estimates the static
background, builds the model and optimises the ELBO on random windows whose length grows when
validation stalls. Validation is the forecast error over a fixed long horizon (condition on the
first frames, roll out with mean weights), so the best checkpoint is the best extrapolator.
"""

from __future__ import annotations

import copy
import math
import os
import time
from pathlib import Path

import numpy as np
import torch

from .. import config as cfgmod
from ..errors import KinecastError
from ..fileio import check_can_create
from ..model import build_model, time_scale_from_times, to_model_time
from ..model.staged import autoencoder_terms, dynamics_terms
from . import checkpoint as ck
from . import stages as S
from . import distributed as D
from .progress import Progress, duration, untrained_reason
from .lock import RunLock
from .data import WindowSampler, expand_paths, load_recordings, median_background, split_train_val
from .schedule import Curriculum, kl_weight, learning_rate, progress

VAL_WINDOWS = 8  # validation windows (evenly spaced over the held-out frames)
LOG_EVERY = 10  # steps between log rows


class TrainingStopped(KinecastError):
    """Training could not continue (repeated numerical faults)."""


def _prepare_folder(run: Path, paths: list[Path], resume: bool, overwrite: bool, run_lock: RunLock) -> None:
    for p in paths:
        src = p.resolve()
        if run.resolve() == src or src in run.resolve().parents:
            raise KinecastError(run, f"output folder is inside the input {p}; choose a folder elsewhere")
    run_lock.refuse_if_held()  # another fit writing it: say so, whatever the folder holds
    if resume:
        ck.check_run_folder(run, need_resume=True)
    elif run.exists() and not run.is_dir():
        raise KinecastError(run, "exists and is not a folder (a run is a folder)")
    elif run.exists() and any(f.name != ck.LOCK for f in run.iterdir()) and not overwrite:
        raise KinecastError(run, "already exists (pass --resume to continue it or --overwrite to replace it)")
    check_can_create(run)


def validate(model, sampler: WindowSampler | None, window: int, cfg, background_only: bool = False) -> float:
    """Mean forecast MSE over held-out windows of ``window`` frames (present frames only).

    ``background_only`` scores the bare static background instead of the model's forecast (the
    floor a model that draws nothing reaches).
    """
    if sampler is None:
        return math.nan
    batch = sampler.fixed(window, VAL_WINDOWS)
    if batch is None:
        return math.nan
    k = cfg.model.velocity_frames
    dev = next(model.parameters()).device
    total, count = 0.0, 0.0
    with torch.no_grad():  # one window at a time, at its own times: exact, and memory stays bounded
        for frames, times, mask in zip(batch.frames, batch.own_times, batch.mask):
            frames = frames[None].to(dev)
            if background_only:
                pred = model.background.expand_as(frames[0])
            else:
                t = to_model_time(times, cfg).to(dev)
                pred = model.rollout(frames[:, :k], t, samples=1, mean_weights=True, ctx_t=t[:k])[0][0, 0]
            err = ((pred - frames[0]) ** 2).mean(dim=(1, 2, 3))[k:]
            m = mask[k:].to(dev).float()
            total, count = total + float((err * m).sum()), count + float(m.sum())
    return total / count if count else math.nan


def _validate_and_keep(model, val_sampler, val_window: int, cfg, cur: Curriculum, run: Path, step: int) -> float:
    """Validate; write the weights as the run's best when they are."""
    model.eval()
    val = validate(model, val_sampler, val_window, cfg)
    model.train()
    if cur.update(val):
        ck.save_tensors(run / ck.WEIGHTS, model.state_dict(), {"step": step, "val_mse": val})
    return val


def _calibrate(run: Path, recs, window: int, cfg, device) -> float | None:
    """Fit the best weights' spread scale on ``recs`` (held-out trials) and store it in the run's
    weights file (see :mod:`kinecast.model.calibration`); None when no trial has room for it."""
    from ..model.calibration import fit_spread_scale

    best, run_cfg = ck.load_run(run, device)
    k = run_cfg.model.velocity_frames
    clips = []
    for rec in recs:
        starts = rec.present_runs(k)
        if not len(starts) or rec.n_frames - starts[0] <= k:
            continue
        a = int(starts[0])
        b = min(rec.n_frames, a + k + 3 * window)
        times = to_model_time(rec.times[a:b] - rec.times[a], run_cfg)
        clips.append((torch.as_tensor(rec.frames[a:b]).to(device), times.to(device),
                      ~torch.as_tensor(rec.missing[a:b])))
    if not clips:
        return None
    gen = torch.Generator(device=device).manual_seed(cfg.train.seed)
    scale = fit_spread_scale(best, clips, cfg.score.band, cfg.train.calibration_samples, gen)
    tensors, meta = ck.load_tensors(run / ck.WEIGHTS)
    tensors["spread_scale"] = torch.tensor(scale, dtype=tensors["background"].dtype)
    ck.save_tensors(run / ck.WEIGHTS, tensors, meta)
    return scale


def _extend_budget(tc: cfgmod.TrainConfig, meta: dict) -> None:
    """Turn ``tc.steps`` / ``tc.budget`` asked for on resume (more training) into totals from the
    run's start: what the checkpoint ``meta`` has done so far plus the extra."""
    if tc.steps:
        tc.steps += int(meta["step"])
    extra_s = cfgmod.parse_budget(tc.budget)
    if extra_s:
        total = math.ceil((float(meta["elapsed"]) + extra_s) * 10) / 10  # to 0.1 s, never short
        tc.budget = duration(total, decimals=1)


def fit(paths, out, cfg: cfgmod.Config | None = None, *, resume: bool = False, overwrite: bool = False,
        more: bool = False, fault_hook=None, show_progress: bool = True, judge=None) -> dict:
    """Train a latent ODE model on recordings and write a run folder.

    Parameters
    ----------
    paths : list of path
        Recordings (frame folders, TIFF stacks, videos), or folders of trial folders.
    out : path
        The run folder to write.
    cfg : Config, optional
        The one config; ``train`` sets the recipe, ``solver.time_scale`` = 0 is resolved from the data.
        With ``resume``, default: the run's own config.toml (pass a changed copy to extend
        ``train.steps`` or ``train.budget``, which count from the run's start unless ``more``).
    resume : bool
        Continue the run in ``out`` (step count, optimiser, schedule and random state); ``paths``
        may be empty to reuse the run's recordings.
    more : bool
        With ``resume``: ``train.steps`` / ``train.budget`` are *additional* training. The run's
        totals become what it has done so far (steps, counted seconds) plus these, and are saved in
        its config.toml; the stage shares are recomputed over the new totals (a large extension
        may go back to an earlier stage; the kept best weights change only when validation improves).
    overwrite : bool
        Replace an existing run folder.
    fault_hook : callable, optional
        ``fault_hook(step) -> bool``; True injects a non-finite loss at that step (tests).
    judge : callable, optional
        ``judge(run, recordings, window, device) -> dict``: the verdict on the held-out recordings
        for the run's best weights, stored as ``verdict`` in the summary (the train verb passes
        :func:`kinecast.score.verdict.judge_run`; training itself imports no scoring). None: no
        verdict (``verdict`` is null).

    Returns
    -------
    dict
        The summary also written to ``summary.json``.
    """
    with RunLock(out, defer=True) as run_lock:  # taken once the folder is checked; released however fit ends
        return _fit(paths, out, cfg, run_lock, resume=resume, overwrite=overwrite, more=more,
                    fault_hook=fault_hook, show_progress=show_progress, judge=judge)


def _fit(paths, out, cfg, run_lock: RunLock, *, resume, overwrite, more, fault_hook, show_progress, judge) -> dict:
    """:func:`fit`; its main process takes ``run_lock`` before anything is written to the run folder."""
    run = Path(out)
    resumed = None
    if resume:
        ck.check_run_folder(run, need_resume=True)
        resumed = ck.load_resume(run)
        paths = paths or resumed[1]["paths"]
        cfg = cfg or cfgmod.load(run / ck.CONFIG)
    cfg = cfgmod.from_dict(cfgmod.to_dict(cfg or cfgmod.Config()))  # a private, validated copy
    if resume and more:
        _extend_budget(cfg.train, resumed[1])
    paths = expand_paths(paths)
    ctx = D.setup(cfg.train.device)
    if ctx.main:  # only the main process writes the run folder, so only it holds the lock
        _prepare_folder(run, paths, resume, overwrite, run_lock)  # refuses before touching anything
        run_lock.take()  # atomic: of two fits started at once on this folder, the second stops here
        _prepare_folder(run, paths, resume, overwrite, run_lock)  # again: no other fit can change it now
        if resume:
            ck.remove_stale_temporaries(run)  # left by a kill mid-checkpoint
    torch.set_num_threads(cfg.train.threads or os.cpu_count() or 1)
    torch.manual_seed(cfg.train.seed + ctx.rank)

    # --- data -----------------------------------------------------------------------------
    recs = load_recordings(paths, cfg)
    # each recording's path as given (expanded); a single recording split in two is named by its slices
    where = {id(r): str(p) for r, p in zip(recs, paths)}
    k = cfg.model.velocity_frames
    if cfg.solver.time_scale == 0:  # resolved on the private copy; the run's config.toml keeps it
        cfg.solver.time_scale = time_scale_from_times([r.times for r in recs], cfg.solver.units_per_frame)
    train_recs, val_recs = split_train_val(recs, cfg, min_len=max(cfg.train.window_start, k + 1))
    sampler = WindowSampler(train_recs, k, cfg.train.seed + ctx.rank)
    longest = sampler.longest_window()
    if cfg.train.window_max:
        longest = min(longest, cfg.train.window_max)
    if longest < k + 1:
        raise KinecastError(paths[0], f"too short: {longest} frames, the model needs at least {k + 1}")
    val_sampler = WindowSampler(val_recs or train_recs, k, 0)
    val_window = min(val_sampler.longest_window(), 3 * longest)  # score extrapolation, not fit
    total_frames = sum(r.n_frames for r in train_recs)

    # --- model ----------------------------------------------------------------------------
    channels = cfg.data.channels
    model = build_model(cfg, channels)
    background = median_background(train_recs) if cfg.model.background else None
    if background is not None:
        model.set_background(torch.from_numpy(background))
    model.to(ctx.device)
    opt = torch.optim.Adam(model.parameters(), lr=cfg.train.lr)
    cur = Curriculum(min(cfg.train.window_start, longest), longest, cfg.train.window_growth,
                     cfg.train.patience)
    stage_state = S.StageState()
    dyn_longest, period = S.dynamics_window(train_recs, background, cfg, sampler.longest_window())
    dyn_longest = max(dyn_longest, k + 1)
    targets = None  # encoded trajectories, made when the dynamics stage starts
    step, elapsed_before, faults, lr_scale, rows = 0, 0.0, 0, 1.0, []
    if resume:
        tensors, meta = resumed
        ck.restore_model(model, {k_: v for k_, v in tensors.items() if not k_.startswith(("opt.", "rng."))},
                         meta, run / ck.RESUME)
        ck.restore_optimizer(opt, tensors, meta["optimizer"])
        torch.set_rng_state(tensors["rng.torch"])
        sampler.rng.bit_generator.state = meta["sampler_rng"]
        cur = Curriculum(**meta["curriculum"])
        cur.done = cur.done and not more  # asked for more: an early stop does not end the extension
        stage_state = S.StageState(**meta.get("stages", {}))
        step, elapsed_before = meta["step"], meta["elapsed"]
        faults, lr_scale = meta["faults"], meta["lr_scale"]
        rows = [r for r in ck.read_log(run) if r.get("step", 0) <= step]
    net = torch.nn.parallel.DistributedDataParallel(model) if ctx.active else model

    if ctx.main:
        try:
            run.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise KinecastError(run, f"cannot create the run folder ({exc.strerror or exc})") from None
        cfgmod.save(cfg, run / ck.CONFIG)
        if background is not None:
            import imageio.v3 as iio

            img = (np.clip(background.transpose(1, 2, 0), 0, 1) * 255).round().astype(np.uint8)
            ck.write_with(run / ck.BACKGROUND, lambda tmp: iio.imwrite(tmp, img.squeeze()))

    def save_resume():
        tensors = dict(model.state_dict())
        opt_t, opt_meta = ck.optimizer_tensors(opt)
        tensors.update(opt_t)
        tensors["rng.torch"] = torch.get_rng_state()
        meta = {"step": step, "elapsed": elapsed_before + (time.time() - t0), "faults": faults,
                "lr_scale": lr_scale, "curriculum": cur.state(), "stages": stage_state.state(),
                "optimizer": opt_meta,
                "sampler_rng": sampler.rng.bit_generator.state, "paths": [str(p) for p in paths],
                "budget": cfg.train.budget, "steps": cfg.train.steps}
        # log first: a kill between the two writes then leaves extra rows (dropped on resume, which
        # keeps rows up to the checkpoint's step), never missing ones
        ck.write_log(run, rows)
        ck.save_tensors(run / ck.RESUME, tensors, meta)

    # --- loop -----------------------------------------------------------------------------
    budget_s = cfgmod.parse_budget(cfg.train.budget)
    steps_total = cfg.train.steps
    if not steps_total and not budget_s:
        raise KinecastError("fit", "no budget: give --steps N or --budget DURATION")
    good = (copy.deepcopy(model.state_dict()), copy.deepcopy(opt.state_dict()))
    t0 = time.time()
    report = Progress(steps_total, budget_s, step, elapsed_before, cfg.train.recipe,
                      enabled=show_progress and ctx.main)
    start_step = step
    val = next((r["val_mse"] for r in reversed(rows) if "val_mse" in r), math.nan)  # the latest, shown
    bg_val = validate(model, val_sampler, val_window, cfg, background_only=True) if background is not None else math.nan
    stop_reason = "budget"
    stage = None
    while True:
        elapsed = elapsed_before + time.time() - t0
        prog = progress(step, elapsed, steps_total, budget_s)
        stop = (steps_total and step >= steps_total) or (budget_s and elapsed >= budget_s) or cur.done
        new_stage, local = S.stage_at(prog, cfg.train)
        if new_stage == S.JOINT:
            cur.follow(min(cfg.train.window_start, longest), prog, cfg.train.window_schedule)
        stop, cur.window = D.sync_decision(ctx, bool(stop), cur.window)
        if stop:
            stop_reason = "early stop: validation stalled at the longest window" if cur.done else "budget"
            break
        if new_stage != stage:
            stage = new_stage
            S.set_trainable(model, stage)
            report.soon()  # a line from the new stage's first step
            if stage == S.DYNAMICS and not stage_state.escaped:
                report.note("kinecast: warning: the position encoder never clearly beat the bare background "
                            f"({stage_state.restarts} restarts); the motion may not be learned")
            if stage == S.DYNAMICS:
                targets = S.EncodedTrajectories(model, sampler.frames, ctx.device)
                still = S.hold_still(model, targets, cfg.train.still_keypoint_px)
                if still:
                    report.note(f"kinecast: keypoint(s) {', '.join(map(str, still))} barely move in the "
                                "training frames and are held still in the forecast")
            if (stage == S.JOINT and cfg.train.recipe == "staged" and step > 0 and ctx.main
                    and not stage_state.joint_checked):
                stage_state.joint_checked = True  # the after-dynamics weights compete for "best"
                val = _validate_and_keep(model, val_sampler, val_window, cfg, cur, run, step)
                rows.append({"step": step, "time_s": round(elapsed, 3), "val_mse": val, "window": cur.window,
                             "stage": S.NUMBER[stage]})
                report.update(step, elapsed, stage, cur.window, val, bg_val, event=True)
        if stage == S.POSITIONS and stage_state.due_restart(local, cfg.train.escape_deadline):
            stage_state = S.StageState(restarts=stage_state.restarts + 1)
            S.restart_positions(model, opt, cfg, channels,
                                cfg.train.seed + S.RESTART_SEED_STRIDE * stage_state.restarts)
            report.note(f"kinecast: the position encoder had not found the moving object by step {step}: "
                        f"restart {stage_state.restarts} from a new seed")
        lr = learning_rate(cfg.train, step, local if cfg.train.recipe == "staged" else prog, lr_scale)
        if cfg.train.recipe == "staged" and stage != S.DYNAMICS:
            peak = cfg.train.positions_lr if stage == S.POSITIONS else cfg.train.joint_lr
            lr *= peak / cfg.train.lr if cfg.train.lr > 0 else 0.0
        beta = kl_weight(cfg.train, prog)
        for g in opt.param_groups:
            g["lr"] = lr
        relapsed = False
        if stage == S.POSITIONS:
            window = min(cfg.train.window_start, longest)
            batch = sampler.draw(cfg.train.batch, window)
            frames = batch.frames.flatten(0, 1)[batch.mask.flatten()].to(ctx.device)
            beta = cfg.train.positions_kl * local if stage_state.sampling() else 0.0
            terms = autoencoder_terms(model, frames, sample=stage_state.sampling(), beta=beta,
                                      repulsion=cfg.train.keypoint_repulsion,
                                      coverage=cfg.train.keypoint_coverage,
                                      shape=cfg.train.heat_map_shape if stage_state.sampling() else 0.0)
            errors = D.mean_over_ranks(ctx, [float(terms["mse"]), float(terms["bg_mse"])])
            if stage_state.observe(*errors, cfg.train.escape_ratio, step):
                report.note(f"kinecast: step {step}: the position encoder found the moving object "
                            f"(reconstruction error {stage_state.ema_rec:.2g}, bare background "
                            f"{stage_state.ema_bg:.2g}); "
                            + ("sampling from now on" if stage_state.sampling() else "staying deterministic"))
            elif stage_state.lost():
                relapsed = True  # the spread is reset after this step's update (autograd holds it now)
                report.note(f"kinecast: step {step}: the position encoder lost the object again "
                            f"(reconstruction error {stage_state.ema_rec:.2g}, bare background "
                            f"{stage_state.ema_bg:.2g}); back to deterministic steps"
                            + ("" if stage_state.relapses < S.MAX_RELAPSES else " for the rest of the stage"))
        elif stage == S.DYNAMICS:
            window = S.grow(min(cfg.train.window_start, dyn_longest), dyn_longest, local)
            batch = sampler.draw(cfg.train.batch, window)
            mean, var = targets.gather(batch.which, batch.starts, window)
            t = to_model_time(batch.times, cfg).to(ctx.device)
            terms = dynamics_terms(model, batch.frames[:, :k].to(ctx.device), t, mean, var,
                                   batch.mask.to(ctx.device), total_frames, 1.0, cfg.train.velocity_aux)
        else:
            window = cur.window
            batch = sampler.draw(cfg.train.batch, window)
            t = to_model_time(batch.times, cfg).to(ctx.device)
            terms = net(batch.frames.to(ctx.device), t, n_total_frames=total_frames, beta=beta,
                        mask=batch.mask.to(ctx.device), decode_frames=cfg.train.decode_frames,
                        agreement_frames=cfg.train.agreement_frames)
        loss = terms["loss"]
        if fault_hook is not None and fault_hook(step):
            loss = loss * float("nan")
        opt.zero_grad(set_to_none=True)
        bad = not torch.isfinite(loss)
        if not bad:
            loss.backward()
            if stage != S.JOINT:  # DistributedDataParallel averages the joint stage's gradients itself
                D.average_gradients(ctx, model)
            gnorm = torch.nn.utils.clip_grad_norm_(model.parameters(), cfg.train.grad_clip or math.inf)
            bad = not torch.isfinite(gnorm)
        if D.any_rank(ctx, bad):
            faults += 1
            if faults > cfg.train.max_faults:
                stop_reason = f"stopped after {faults} non-finite losses"
                break
            model.load_state_dict(good[0])
            opt.load_state_dict(good[1])
            lr_scale *= 0.5
            report.note(f"kinecast: non-finite loss at step {step}: rolled back, learning rate × {lr_scale:g}")
            continue
        opt.step()
        if relapsed:
            S.reset_spread(model, opt)
        step += 1
        if step % LOG_EVERY == 0 or step == 1:
            row = {"step": step, "time_s": round(elapsed, 3), "lr": lr, "beta": beta, "window": window,
                   "stage": S.NUMBER[stage]}
            row.update({k_: float(v.detach()) for k_, v in terms.items() if torch.is_tensor(v) and v.dim() == 0})
            rows.append(row)
        if step % cfg.train.val_every == 0:
            if ctx.main and stage == S.JOINT:
                val = _validate_and_keep(model, val_sampler, val_window, cfg, cur, run, step)
                rows.append({"step": step, "time_s": round(elapsed, 3), "val_mse": val, "window": cur.window,
                             "stage": S.NUMBER[stage]})
                report.update(step, elapsed_before + time.time() - t0, stage, window, val, bg_val, event=True)
                # never stop a run that does not clearly beat drawing the bare background (the verdict's
                # floor): one that draws the mean frame scores just under it (0.99x, measured)
                if cur.done and not cur.best < cfgmod.FLOOR_MARGIN * bg_val:
                    cur.done = False
            good = (copy.deepcopy(model.state_dict()), copy.deepcopy(opt.state_dict()))
        if ctx.main and step % cfg.train.checkpoint_every == 0:
            save_resume()
        report.update(step, elapsed_before + time.time() - t0, stage, window, val, bg_val)
    report.close()
    if resume and step == start_step and ctx.main:
        report.note(f"kinecast: nothing trained: this run had already finished ({step} steps, "
                    f"{duration(elapsed_before)}); give --steps N or --budget DURATION with --resume "
                    "to train that much more")

    spread = D.replica_spread(ctx, model)
    summary = {}
    if ctx.main:
        if not (run / ck.WEIGHTS).exists() or not math.isfinite(cur.best):
            val = validate(model.eval(), val_sampler, val_window, cfg)
            ck.save_tensors(run / ck.WEIGHTS, model.state_dict(), {"step": step, "val_mse": val})
            cur.best = val if math.isfinite(val) else cur.best
        save_resume()
        spread_scale = (_calibrate(run, val_recs, longest, cfg, ctx.device)
                        if cfg.train.calibration_samples > 1 and val_recs else None)
        judged = judge(run, val_recs or train_recs[-1:], longest, ctx.device) if judge else None
        from ..plots import loss_curve

        loss_curve(rows, run / ck.LOSS_PLOT, overwrite=True)
        summary = {"steps": step, "elapsed_s": round(elapsed_before + time.time() - t0, 2),
                   "stop_reason": stop_reason, "best_val_mse": cur.best, "val_window": val_window,
                   "final_window": cur.window, "longest_window": longest, "faults": faults,
                   "recordings": [str(p) for p in paths], "train_recordings": len(train_recs),
                   "val_recordings": len(val_recs), "trained_on": [where.get(id(r), r.source) for r in train_recs],
                   "validated_on": [where.get(id(r), r.source) for r in val_recs], "time_scale": cfg.solver.time_scale,
                   "world_size": ctx.world, "replica_spread": spread, "device": str(ctx.device),
                   "threads": torch.get_num_threads(), "recipe": cfg.train.recipe,
                   "positions_found": stage_state.escaped if cfg.train.recipe == "staged" else None,
                   "positions_found_step": stage_state.escaped_step,
                   "positions_restarts": stage_state.restarts, "positions_relapses": stage_state.relapses,
                   "dynamics_window": dyn_longest,
                   "still_keypoints": [i for i, m in enumerate(model.field.moving.tolist()[::2]) if m == 0.0],
                   "tracked_period_s": period, "background_val_mse": bg_val, "verdict": judged,
                   "spread_scale": spread_scale,
                   "untrained": untrained_reason(cfg.train.recipe, step, stage_state.escaped, cur.best, bg_val),
                   "caution": "Forecasts are statistical extrapolations, not measurements; "
                              "not for safety-critical control."}
        ck.write_summary(run, summary)
    D.teardown(ctx)
    if stop_reason.startswith("stopped after"):
        raise TrainingStopped(run, f"training {stop_reason}; the best checkpoint is kept in {run / ck.WEIGHTS}")
    return summary
