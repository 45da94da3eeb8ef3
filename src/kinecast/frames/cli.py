"""``kinecast inspect PATH``: print what a recording holds and what may be wrong with it.

A folder of trial folders (as ``kinecast fit`` accepts) gives one line per trial and a totals line.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import KinecastError
from .images import expand_trials
from .inspect import format_inspection, format_totals, format_trial, inspect_recording


def configure(parser) -> None:
    parser.add_argument("path", metavar="PATH",
                        help="folder of frames, multi-page TIFF, or video (mp4, avi, mov, mkv); or a folder "
                             "of trial folders: one line per trial and the totals")
    parser.add_argument("--times", metavar="CSV",
                        help="timestamps CSV (default: timestamps.csv in the folder, or <name>.csv "
                             "beside a file)")


def run(args, cfg) -> int:
    trials = expand_trials(args.path)
    if trials == [Path(args.path)]:
        print(format_inspection(inspect_recording(args.path, cfg.data, args.times)))
        return 0
    if args.times:
        raise KinecastError("--times", f"names one timestamps file, but {args.path} holds {len(trials)} "
                                       "trial folders; each trial reads its own timestamps.csv")
    width = max(len(t.name) for t in trials)
    reports, unreadable = [], []
    for trial in trials:
        try:
            reports.append(inspect_recording(trial, cfg.data))
        except KinecastError as exc:          # the other trials are still worth reporting
            unreadable.append(exc)
            print(f"{trial.name:<{width}}  cannot read: {exc}")
            continue
        print(format_trial(trial.name, reports[-1], width))
    print(format_totals(reports, len(unreadable), width))
    if unreadable:
        raise unreadable[0]
    return 0
