"""Did the joint stage improve on the model the dynamics stage left? Read from finished runs' logs.

``python bench/joint_stage.py RUN [RUN ...]`` (run folders of the staged recipe, e.g.
``/tmp/work/runs/*``) prints one line per run: the validation MSE of the first joint-stage
validation (the weights as the dynamics stage left them), the best later one, the bare
background's, how long the run trained and why it stopped. A run whose joint stage never beats
its first validation and that stopped early spent the rest of its budget on nothing.

Only the run folder's ``log.csv`` and ``summary.json`` are read; nothing is trained.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
from pathlib import Path

JOINT_STAGE = 3  # the "stage" column of log.csv: 1 positions, 2 dynamics, 3 joint


def joint_gain(run: Path) -> dict | None:
    """``{"after_dynamics", "joint_best", "validations", "background", "elapsed_s", "stop"}`` for
    ``run``; None when the run has no joint-stage validation."""
    with open(run / "log.csv", newline="") as fh:
        vals = [float(r["val_mse"]) for r in csv.DictReader(fh)
                if r["val_mse"] and int(float(r["stage"])) == JOINT_STAGE]
    if not vals:
        return None
    summary = json.loads((run / "summary.json").read_text())
    return {"after_dynamics": vals[0], "joint_best": min(vals[1:], default=math.nan),
            "validations": len(vals) - 1, "background": summary.get("background_val_mse", math.nan),
            "elapsed_s": summary.get("elapsed_s", math.nan), "stop": summary.get("stop_reason", "")}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("runs", nargs="+", type=Path)
    args = p.parse_args(argv)
    print("run | after dynamics | joint best | later validations | background | trained (s) | stop")
    for run in args.runs:
        if not (run / "log.csv").exists() or not (run / "summary.json").exists():
            continue
        g = joint_gain(run)
        if g is not None:
            print(f"{run.name} | {g['after_dynamics']:.5f} | {g['joint_best']:.5f} | {g['validations']} | "
                  f"{g['background']:.5f} | {g['elapsed_s']:.0f} | {g['stop']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
