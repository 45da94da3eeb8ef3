"""``kinecast fill``: fill the frames a recording dropped, from a trained run.

Writes DIR as a complete recording at the recording's own quality (see :mod:`.native`): the
recorded frames exactly as they are, a predicted frame at the recording's own size, bit depth and
colour in each missing slot, ``timestamps.csv`` (so DIR reads back as a recording) and
``filled.csv`` (``frame,time_s,origin``: recorded or predicted). A recording with no dropped frames
writes nothing.
"""

from __future__ import annotations

import argparse
import textwrap
from pathlib import Path

from ..fileio import check_can_create
from . import core
from ..verbs import CAUTION, open_run, refuse_inside
from .native import BACKGROUND_SAMPLES, COLOUR_FROM_GREY, LUMA_FROM_RGB

HELP_WIDTH = 100   # columns of the help text's hand-wrapped lines


def _bullet(text: str) -> str:
    return textwrap.fill(text, HELP_WIDTH, initial_indent="  - ", subsequent_indent="    ")


EPILOG = f"""\
What DIR holds: every slot of the recording, so that DIR reads back as a complete recording.
  - Recorded frames are kept exactly: for a frame folder, the same files under their own names
    (hard links where the file system allows, else byte-for-byte copies); for a TIFF stack or a
    video, each frame decoded and written losslessly as frame_NNNN.tif / frame_NNNN.png by slot.
  - Each missing slot gets a predicted frame, named after the folder's own numbering, at the
    recording's own size, bit depth and colour: the model predicts at its own size (data.size;
    a non-square picture is padded to square with its edge pixels, and that band is cut off
    again), and the prediction is resized (bicubic to enlarge, area averaging to shrink), clipped and
    scaled to the sample type (255 for 8-bit, 65535 for 16-bit).
{_bullet("A grey model on colour frames: " + COLOUR_FROM_GREY.format(n=BACKGROUND_SAMPLES) + ".")}
{_bullet("An RGB model on grey frames: " + LUMA_FROM_RGB + ".")}
  - timestamps.csv lists every frame and its time; filled.csv says which frames are recorded and
    which predicted.
A recording with no dropped frames: "nothing to fill", nothing written (exit 0).
Predicted frames are statistical extrapolations from the model, not measurements."""


def configure(parser) -> None:
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = EPILOG
    parser.add_argument("run", metavar="RUN", help="run folder written by `kinecast fit`")
    parser.add_argument("path", metavar="PATH", help="recording with dropped frames")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the complete recording")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    parser.add_argument("--device", choices=("auto", "cpu", "cuda"), help="compute device (train.device)")


def _kept(result) -> str:
    """How the recorded frames were written, in words."""
    parts = []
    if result.linked:
        parts.append(f"{result.linked} as hard links to the original files")
    if result.copied:
        parts.append(f"{result.copied} as byte-for-byte copies")
    if result.decoded:
        parts.append(f"{result.decoded} decoded and written losslessly")
    return ", ".join(parts)


def run(args, cfg) -> int:
    from ..errors import KinecastError
    from .native import write_filled

    out = Path(args.out)
    refuse_inside(out, args.path)
    if out.exists() and (not out.is_dir() or any(out.iterdir())) and not args.overwrite:
        raise KinecastError(out, "already exists (pass --overwrite to replace it)")
    check_can_create(out)
    model, cfg, rec, device = open_run(args, cfg)
    if not rec.missing.any():
        print(f"nothing to fill: {args.path} has no dropped frames ({rec.n_frames} frames); nothing written")
        return 0
    frames, filled = core.fill(model, cfg, rec, device)
    result = write_filled(rec, args.path, frames, filled, out, overwrite=args.overwrite)
    for note in result.notes:
        print(note)
    model_size = f"{rec.size[1]}x{rec.size[0]} {cfg.data.color}"
    print(f"filled {int(filled.sum())} of {rec.n_frames} frames: predicted at {model_size}, written at "
          f"{result.fmt.describe()} like the recording; recorded frames kept ({_kept(result)}); "
          f"complete recording written to {out} (filled.csv marks the predicted frames)")
    print(f"note: filled frames are model output: {CAUTION}")
    return 0
