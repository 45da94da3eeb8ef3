"""The ``kinecast rig`` verb's camera-realism options, against the help text and defaults the verb
had before its options became one table (recorded from ``kinecast rig --help`` and the parser's
defaults at that commit)."""

from __future__ import annotations

import argparse
import os
import subprocess
import sys

from kinecast.rigs import cli

# The "camera realism" section of `kinecast rig --help` (COLUMNS=100) as printed before the options
# were built from a table: the same flags, metavars and help text must stay.
HELP_BEFORE = """\
camera realism (defaults: a clean camera):
  --noise SIGMA         Gaussian sensor noise, fraction of full scale
  --blur N              exposure blur: average N sub-frame renders over the exposure (1 = sharp)
  --exposure FRACTION   shutter-open time as a fraction of the frame interval (with --blur)
  --vignette STRENGTH   brightness lost at the corners (0 to 1)
  --texture CONTRAST    smooth random static background texture (0 to 1)
  --flicker SIGMA       per-frame lighting gain standard deviation
  --drop P              probability of dropping each frame (never the first 3)
  --jitter SECONDS      capture-time jitter standard deviation
"""
# The parser's defaults before the change, with their types (blur counts sub-frames: an int).
DEFAULTS_BEFORE = {"noise": 0.0, "blur": 1, "exposure": 0.5, "vignette": 0.0, "texture": 0.0,
                   "flicker": 0.0, "drop": 0.0, "jitter": 0.0}


def test_help_lists_the_camera_options_as_before():
    env = {**os.environ, "COLUMNS": "100"}
    out = subprocess.run([sys.executable, "-m", "kinecast", "rig", "--help"], capture_output=True,
                         text=True, env=env, check=True).stdout
    start = out.index("camera realism")
    section = out[start:out.index("\n\n", start) + 1]
    assert section == HELP_BEFORE


def test_camera_defaults_and_values_reach_the_arguments_as_before():
    parser = argparse.ArgumentParser()
    cli.configure(parser)
    args = vars(parser.parse_args(["pendulum", "--out", "x"]))
    got = {key: args[key] for key in DEFAULTS_BEFORE}
    assert got == DEFAULTS_BEFORE
    assert [type(v) for v in got.values()] == [type(v) for v in DEFAULTS_BEFORE.values()]
    args = parser.parse_args(["pendulum", "--out", "x", "--blur", "3", "--jitter", "0.002"])
    assert (args.blur, args.jitter) == (3, 0.002)
    assert type(args.blur) is int   # the Camera field is a whole number of sub-frames
