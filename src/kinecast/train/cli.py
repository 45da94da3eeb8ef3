"""``kinecast fit``: train on one or more recordings and write a run folder."""

from __future__ import annotations

from pathlib import Path

from .. import config as cfgmod
from ..errors import KinecastError


def configure(parser) -> None:
    parser.add_argument("paths", nargs="*", metavar="PATH",
                        help="recordings: frame folders, TIFF stacks, videos, or a folder of trial folders")
    parser.add_argument("--out", metavar="RUN", help="run folder to write")
    parser.add_argument("--resume", metavar="RUN",
                        help="continue the run in this folder: alone, it finishes the run's own budget; "
                             "with --budget or --steps, it trains that much MORE (the run's total becomes "
                             "what it has done plus this, and the recipe's stage shares are recomputed "
                             "over the new total)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing run folder")
    parser.add_argument("--budget", metavar="DURATION",
                        help="wall-clock training time, e.g. 90s, 5m, 5min, '5 min', 1h, 1h30m; a number "
                             "needs a unit (train.budget); with --resume: additional time")
    parser.add_argument("--steps", type=int, metavar="N",
                        help="number of training steps (train.steps); with --resume: additional steps")
    parser.add_argument("--device", choices=("auto", "cpu", "cuda"), help="compute device (train.device)")
    parser.add_argument("--seed", type=int, help="random seed (train.seed)")
    parser.add_argument("--quiet", action="store_true", help="no progress lines (warnings are still shown)")


def run(args, cfg) -> int:
    from ..score.verdict import judge_run
    from .loop import fit
    from .progress import spread_line

    if args.resume:
        if args.out and Path(args.out) != Path(args.resume):
            raise KinecastError("--out", "give either --out RUN or --resume RUN, not both")
        if args.config:
            raise KinecastError("--config", "a resumed run keeps its own config.toml; use --set to change keys")
        from ..runfolder import CONFIG, check_run_folder

        check_run_folder(Path(args.resume), need_resume=True)
        cfg = cfgmod.apply_overrides(cfgmod.load(Path(args.resume) / CONFIG, cfgmod.saved_run_base()), args.overrides)
        out = args.resume
    else:
        if not args.out:
            raise KinecastError("kinecast fit", "give --out RUN (or --resume RUN)")
        if not args.paths:
            raise KinecastError("kinecast fit", "no recordings given")
        out = args.out
    values = {"train.budget": args.budget, "train.steps": args.steps, "train.device": args.device,
              "train.seed": args.seed}
    if args.steps is not None and args.budget is None:
        values["train.budget"] = "0"  # the steps given are the budget
    if args.budget is not None and args.steps is None:
        values["train.steps"] = 0  # the budget given is the budget (a config's step count would cut it)
    cfg = cfgmod.with_values(cfg, values)
    more = bool(args.resume) and (args.budget is not None or args.steps is not None)
    summary = fit(args.paths, out, cfg, resume=bool(args.resume), overwrite=args.overwrite, more=more,
                  show_progress=not args.quiet, judge=judge_run)
    if summary:
        print(f"run written to {out}: {summary['steps']} steps in {summary['elapsed_s']:.0f} s, "
              f"best validation MSE {summary['best_val_mse']:.4g} ({summary['stop_reason']})")
        verdict = summary.get("verdict") or {}
        if verdict:
            level = {"failed": "FAILED", "weak": "weak"}.get(verdict["level"], verdict["level"])
            print(f"verdict on the held-out frames ({level}): {verdict['text']}")
        if summary.get("spread_scale"):
            print(spread_line(summary, cfg.score.band))
            if summary.get("pixel_noise"):
                print(f"sampled futures: pixel noise of std {summary['pixel_noise']:.3g} (intensity 0-1) belongs "
                      "to their predictive distribution (fitted likewise on the object's pixels; used by the "
                      "score's coverage bands)")
        if summary.get("untrained"):
            print(f"kinecast: warning: the model is untrained: {summary['untrained']}. Its forecasts mean "
                  f"nothing yet; train longer (kinecast fit --resume {out} --budget 5m adds 5 minutes).")
    return 0
