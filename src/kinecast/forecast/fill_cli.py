"""``kinecast fill``: fill the frames a recording dropped, from a trained run.

Writes DIR/frame_0000.png ... (every slot, at model resolution), DIR/timestamps.csv (so DIR reads
back as a recording) and DIR/filled.csv marking which frames were filled.
"""

from __future__ import annotations

from pathlib import Path

from ..fileio import check_can_create, write_text
from . import core
from .cli import CAUTION, open_run, refuse_inside


def configure(parser) -> None:
    parser.add_argument("run", metavar="RUN", help="run folder written by `kinecast fit`")
    parser.add_argument("path", metavar="PATH", help="recording with dropped frames")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the complete frames")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    parser.add_argument("--device", choices=("auto", "cpu", "cuda"), help="compute device (train.device)")


def run(args, cfg) -> int:
    from ..errors import KinecastError
    from .render import write_frames

    out = Path(args.out)
    refuse_inside(out, args.path)
    if out.exists() and (not out.is_dir() or any(out.iterdir())) and not args.overwrite:
        raise KinecastError(out, "already exists (pass --overwrite to replace it)")
    check_can_create(out)
    model, cfg, rec, device = open_run(args, cfg)
    frames, filled = core.fill(model, cfg, rec, device)
    write_frames(frames, out, 1.0 / rec.median_interval, overwrite=args.overwrite)
    names = sorted(p.name for p in out.glob("frame_*.png"))
    write_text(out / "timestamps.csv", "frame,time_s\n" + "".join(
        f"{name},{t:.6f}\n" for name, t in zip(names, rec.times)))
    write_text(out / "filled.csv", "frame,time_s,filled\n" + "".join(
        f"{name},{t:.6f},{int(f)}\n" for name, t, f in zip(names, rec.times, filled)))
    print(f"filled {int(filled.sum())} of {rec.n_frames} frames; complete recording written to {out} "
          f"(filled.csv marks them)")
    print(f"note: filled frames are model output: {CAUTION}")
    return 0
