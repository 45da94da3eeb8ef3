"""``kinecast inspect PATH``: print what a recording holds and what may be wrong with it."""

from __future__ import annotations

from .inspect import format_inspection, inspect_recording


def configure(parser) -> None:
    parser.add_argument("path", metavar="PATH",
                        help="folder of frames, multi-page TIFF, or video (mp4, avi, mov, mkv)")
    parser.add_argument("--times", metavar="CSV",
                        help="timestamps CSV (default: timestamps.csv in the folder, or <name>.csv "
                             "beside a file)")


def run(args, cfg) -> int:
    print(format_inspection(inspect_recording(args.path, cfg.data, args.times)))
    return 0
