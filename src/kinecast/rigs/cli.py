"""``kinecast rig NAME --out DIR``: render a synthetic lab rig recording with ground truth."""

from __future__ import annotations

import argparse
from pathlib import Path

from ..errors import KinecastError
from .camera import Camera
from .catalog import RIGS
from .look import CLASSIC, LOOKS, MIXED, look_names
from .write import DROPPED_DIR, write_rig

# The camera-realism options, one per Camera field of the same name: (flag without "--", type,
# metavar, help). Each option's default is the field's default in Camera (a clean camera), so the
# defaults have one home.
CAMERA_FLAGS = (
    ("noise", float, "SIGMA", "Gaussian sensor noise, fraction of full scale"),
    ("blur", int, "N", "exposure blur: average N sub-frame renders over the exposure (1 = sharp)"),
    ("exposure", float, "FRACTION", "shutter-open time as a fraction of the frame interval (with --blur)"),
    ("vignette", float, "STRENGTH", "brightness lost at the corners (0 to 1)"),
    ("texture", float, "CONTRAST", "smooth random static background texture (0 to 1)"),
    ("flicker", float, "SIGMA", "per-frame lighting gain standard deviation"),
    ("drop", float, "P", "probability of dropping each frame (never the first 3)"),
    ("jitter", float, "SECONDS", "capture-time jitter standard deviation"),
)


def _epilog() -> str:
    lines = ["rigs and their parameters (set with --param KEY=VALUE):"]
    for rig in RIGS.values():
        lines.append(f"  {rig.name}: {rig.summary}")
        lines.append("    " + ", ".join(f"{k}={v:g}" for k, v in rig.defaults.items()))
    lines.append("looks (--look NAME; the physics and truth are the same in every look):")
    lines += [f"  {look.name}: {look.summary}" for look in LOOKS.values()]
    lines.append(f"  {MIXED}: each trial draws one of the looks above at random from the seed")
    lines.append("Frames are synthetic; truth.csv in each trial folder holds the simulated state.")
    return "\n".join(lines)


def configure(parser: argparse.ArgumentParser) -> None:
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = _epilog()
    parser.add_argument("name", metavar="NAME", help=f"rig to render: {', '.join(RIGS)}")
    parser.add_argument("--out", metavar="DIR", required=True, help="folder to write trial_000/ ... into")
    parser.add_argument("--trials", type=int, default=1, metavar="N", help="trials, each with its own "
                        "initial condition (default 1)")
    parser.add_argument("--frames", type=int, default=60, metavar="T", help="frames per trial (default 60)")
    parser.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    parser.add_argument("--size", type=int, default=64, metavar="PX",
                        help="frame side in pixels (default 64)")
    parser.add_argument("--fps", type=float, default=30.0, metavar="F", help="frame rate (default 30)")
    parser.add_argument("--channels", default="rgb", choices=("grey", "rgb"), help="colour or grey frames "
                        "(default rgb)")
    parser.add_argument("--look", default=CLASSIC, metavar="NAME",
                        help=f"how the rig is drawn: {', '.join(look_names())} (default {CLASSIC}; "
                        "see below)")
    parser.add_argument("--param", dest="params", action="append", default=[], metavar="KEY=VALUE",
                        help="set a physical parameter of the rig (see below); may be repeated")
    cam = parser.add_argument_group("camera realism (defaults: a clean camera)")
    clean = Camera()
    for flag, kind, metavar, text in CAMERA_FLAGS:
        cam.add_argument(f"--{flag}", type=kind, default=getattr(clean, flag), metavar=metavar, help=text)
    parser.add_argument("--overwrite", action="store_true",
                        help="write into an existing non-empty DIR, replacing its trial files")


def parse_params(items: list[str]) -> dict[str, str]:
    """``KEY=VALUE`` strings to a dict (values are checked by the rig)."""
    out = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip() or not value.strip():
            raise KinecastError(f"--param {item}", "expected KEY=VALUE, e.g. --param damping=0")
        out[key.strip()] = value.strip()
    return out


def _span(folders: list[Path]) -> str:
    return folders[0].name if len(folders) == 1 else f"{folders[0].name} ... {folders[-1].name}"


def _dropped_note(folders: list[Path]) -> str:
    """How many frames the camera dropped and where they were kept (only folders that exist)."""
    kept = {f: len(list((f / DROPPED_DIR).glob("frame_*.png"))) for f in folders if (f / DROPPED_DIR).is_dir()}
    kept = {f: n for f, n in kept.items() if n}
    if not kept:
        return "no frames dropped"
    if len(kept) == 1:
        where = f"{next(iter(kept)).name}/{DROPPED_DIR}/"
    elif len(kept) == len(folders):
        where = f"{DROPPED_DIR}/ of every trial"
    else:
        where = f"{DROPPED_DIR}/ of {', '.join(f.name for f in sorted(kept))}"
    return f"{sum(kept.values())} dropped frame(s) kept in {where}"


def run(args: argparse.Namespace, cfg) -> int:
    """Render and write the trials; print where they went."""
    camera = Camera(**{flag: getattr(args, flag) for flag, *_ in CAMERA_FLAGS})
    camera.check(prefix="--")
    folders = write_rig(args.name, args.out, trials=args.trials, frames=args.frames, seed=args.seed,
                        size=args.size, fps=args.fps, camera=camera, channels=args.channels,
                        params=parse_params(args.params), overwrite=args.overwrite, progress=True,
                        look=args.look)
    print(f"wrote {len(folders)} trial(s) of rig {args.name!r} to {Path(args.out)} ({_span(folders)}; "
          f"{args.frames} frames each, look {args.look}; {_dropped_note(folders)})")
    print("frames are synthetic; truth.csv holds the simulated state of every frame")
    return 0
