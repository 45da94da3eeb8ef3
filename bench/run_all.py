"""Run every benchmark and write one table: ``python bench/run_all.py [--quick]``.

Prints a markdown table (measure, value, goal, met) and writes it with the raw numbers to
``bench/results/latest.md`` and ``latest.json`` (``smoke.md``/``smoke.json`` for the toy profile).
Parts: peak (machine FLOP/s), train (step throughput and efficiency), rollout, memory, video,
quality (forecast quality and time-to-quality).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

if __package__ in (None, ""):  # run as a script: make `bench` and `kinecast` importable
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench import common as C  # noqa: E402
from kinecast.config import parse_budget  # noqa: E402
from kinecast.errors import EXIT_BAD_INPUT, KinecastError  # noqa: E402
from kinecast.rigs import get_rig  # noqa: E402
from bench.rows import (memory_rows, peak_rows, quality_rows, rollout_rows, train_rows,  # noqa: E402
                        video_rows)

PARTS = ("peak", "train", "rollout", "memory", "video", "quality")


def parse_args(argv=None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="bench/run_all.py", description=__doc__.splitlines()[0])
    size = p.add_mutually_exclusive_group()
    size.add_argument("--quick", action="store_true", help="short budget, fewer rigs and sizes (< 10 min)")
    size.add_argument("--smoke", action="store_true", help="toy sizes, seconds long; for development only")
    p.add_argument("--budget", help="wall-clock budget per learned method per rig, e.g. 45s or 5m")
    p.add_argument("--rigs", help="comma-separated rigs for the quality part (default: the profile's)")
    p.add_argument("--only", help=f"comma-separated parts to run, of {','.join(PARTS)}")
    p.add_argument("--device", default="auto", choices=("auto", "cpu", "cuda"))
    p.add_argument("--out", type=Path, default=C.RESULTS_DIR, help="results folder")
    return p.parse_args(argv)


def run(args: argparse.Namespace) -> C.Report:
    """Run the chosen parts and return the report (also written under ``args.out``)."""
    from bench import flops, memory, quality, throughput, video_read

    profile = C.PROFILES["smoke" if args.smoke else "quick" if args.quick else "full"]
    parts = tuple(args.only.split(",")) if args.only else PARTS
    unknown = set(parts) - set(PARTS)
    if unknown:
        raise SystemExit(f"bench: unknown part(s) {', '.join(sorted(unknown))}: allowed {', '.join(PARTS)}")
    rigs = tuple(args.rigs.split(",")) if args.rigs else profile.rigs
    budget = args.budget or profile.budget
    for rig in rigs:  # refuse typos before minutes of work
        get_rig(rig)
    if parse_budget(budget, "--budget") <= 0:
        raise KinecastError("--budget", f"bad value {budget!r}: the learned methods need a budget above 0")
    device = C.pick_device(args.device)
    report = C.Report(profile.name)
    report.meta = {"started": _now(), "load_start": C.load_average(), "budget": budget, "rigs": list(rigs),
                   "parts": list(parts), "profile": profile.__dict__, "notes": []}
    t0 = time.perf_counter()
    raw = report.raw
    with tempfile.TemporaryDirectory(prefix="kinecast-bench-") as tmp:
        work = Path(tmp)
        if "peak" in parts or "train" in parts:
            _say("peak FLOP/s")
            raw["peak"] = flops.peak_rates(device, profile.repeats)
            report.rows += peak_rows(raw["peak"])
        if "train" in parts:
            raw["train"] = []
            for size in profile.train_sizes:
                for precision in raw["peak"]:  # fp32, and bf16 where the machine has it: side by side
                    _say(f"training step at {size} px, {precision}")
                    raw["train"].append(throughput.train_step_rate(size, profile.step_window, profile.repeats,
                                                                   device, precision))
            raw["gain"] = []
            if "bf16" in raw["peak"]:
                for size in profile.train_sizes:
                    _say(f"bf16 against fp32 at {size} px, {profile.gain_rounds} interleaved rounds")
                    raw["gain"].append(throughput.precision_gain(size, profile.step_window, profile.gain_rounds,
                                                                 device))
            report.rows += train_rows(raw["peak"], raw["train"], profile, raw["gain"])
            raw["profile"] = {}
            for precision in raw["peak"]:
                _say(f"profile of the {profile.efficiency_size} px step, {precision}")
                ops = throughput.step_profile(profile.efficiency_size, profile.step_window, device, precision)
                raw["profile"][precision] = ops
                report.meta["notes"].append(
                    f"{profile.efficiency_size} px training step in {precision}, top operators by own CPU time "
                    "(torch.profiler, 3 steps): " + ", ".join(f"{name} {share:.0%}" for name, share in ops))
        if "rollout" in parts:
            raw["rollout"] = []
            for s in profile.rollout_samples:
                _say(f"rollout with {s} sample(s)")
                raw["rollout"].append(throughput.rollout_rate(profile.rollout_size, profile.rollout_frames,
                                                              s, profile.repeats, device))
            report.rows += rollout_rows(raw["rollout"])
        if "memory" in parts:
            _say("rendering the long pendulum recording")
            frames = throughput.pendulum_frames(profile.memory_size, max(profile.memory_frames))
            recs = memory.write_recordings(frames, profile.memory_frames, work / "memory")
            raw["memory"] = []
            for n, path in recs.items():
                _say(f"peak RSS, {n} frames")
                got = memory.training_peak_rss(path, work / "memory" / f"run_{n}", profile.memory_size,
                                               profile.memory_steps, args.device, work / "cache")
                raw["memory"].append({"frames": n, **got})
            report.rows += memory_rows(raw["memory"], profile)
        if "video" in parts:
            _say("video read")
            src = throughput.pendulum_frames(profile.video_size, profile.video_frames)
            path = video_read.write_video(src, work / "video.mp4", profile.video_upscale)
            raw["video"] = video_read.read_ratio(path, profile.video_size, profile.repeats)
            report.rows += video_rows(raw["video"])
        if "quality" in parts:
            raw["quality"] = quality.run_quality(profile, budget, rigs, args.device, work / "quality")
            rows, notes = quality_rows(raw["quality"], budget)
            report.rows += rows
            report.meta["notes"] += notes
    report.meta.update(finished=_now(), load_end=C.load_average(), machine=C.machine_info(device),
                       elapsed_s=round(time.perf_counter() - t0, 1))
    report.write(args.out, "smoke" if profile.name == "smoke" else "latest")
    return report


def _now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _say(what: str) -> None:
    print(f"bench: {what}", file=sys.stderr, flush=True)


def main(argv=None) -> int:
    try:
        report = run(parse_args(argv))
    except KinecastError as exc:
        print(f"bench: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(report.markdown())
    return 0


if __name__ == "__main__":
    sys.exit(main())
