"""Helpers shared by the verb modules (``*/cli.py``): the caution line, ``--seed``, opening a trained
run for use, and checks of output places and counts. Verb modules import these from here, never
from one another.
"""

from __future__ import annotations

from pathlib import Path

from .errors import KinecastError

__all__ = ["CAUTION", "FIXED_BY_RUN", "add_seed_option", "at_least_one", "fixed_keys", "open_run",
           "refuse_inside", "with_seed"]

# Keys a trained model is built for (a whole section when no key is named); its config.toml fixes them.
FIXED_BY_RUN = (("data", "size"), ("data", "color"), ("model", None))
CAUTION = "forecasts are statistical extrapolations, not measurements; not for safety-critical control"


def add_seed_option(parser) -> None:
    """``--seed N``: the seed of the sampled futures, shared by the verbs that draw them."""
    parser.add_argument("--seed", type=int, metavar="N",
                        help="seed of the sampled futures (forecast.seed): the same seed gives the same "
                             "samples; matters with more than one sample")


def with_seed(args, cfg):
    """``cfg`` with ``--seed`` (when given) as ``forecast.seed``, checked like the config key."""
    from . import config as cfgmod

    return cfgmod.with_values(cfg, {"forecast.seed": args.seed})


def open_run(args, cfg, path: str | Path | None = None):
    """The run's model and config (with this command's --set overrides) and the recording
    (``path``, default ``args.path``)."""
    from . import config as cfgmod
    from .forecast import core
    from .frames import read_recording
    from .heap import keep_large_blocks
    from .model.precision import use_precision
    from .runfolder import load_run
    from .train.distributed import pick_device

    device = pick_device(args.device or cfg.train.device)
    model, trained = load_run(args.run, device, precision="fp32")  # the format in use may be --set below
    run_cfg = cfgmod.apply_overrides(trained, args.overrides)
    was, now = cfgmod.to_dict(trained), cfgmod.to_dict(run_cfg)
    for section, name in fixed_keys(was):  # the model was built for these: --set cannot change them
        if was[section][name] != now[section][name]:
            key = f"{section}.{name}"
            raise KinecastError(f"--set {key}", f"{args.run} was trained with {key} = "
                                                f"{was[section][name]!r}; a trained run's frame size, "
                                                "colour and model keys cannot change")
    for section in ("forecast", "score"):  # per-use settings come from this command
        setattr(run_cfg, section, getattr(cfg, section))
    use_precision(model, run_cfg.train.precision, device)
    if run_cfg.train.keep_heap:
        keep_large_blocks()
    rec = read_recording(args.path if path is None else path, run_cfg.data)
    core.check_compatible(rec, run_cfg)
    return model, run_cfg, rec, device


def refuse_inside(out: Path, src: str | Path) -> None:
    src = Path(src).resolve()
    if src.is_dir() and (out.resolve() == src or src in out.resolve().parents):
        raise KinecastError(out, f"output is inside the input folder {src}; choose a place elsewhere")


def fixed_keys(tree: dict) -> list[tuple[str, str]]:
    """(section, key) of every key in :data:`FIXED_BY_RUN`, sections expanded."""
    return [(section, k) for section, key in FIXED_BY_RUN for k in ([key] if key else tree[section])]


def at_least_one(option: str, given: int | None, default: int) -> int:
    """An option's count (``default`` when not given); 0 or less is refused, never silently replaced."""
    value = default if given is None else given
    if value < 1:
        raise KinecastError(option, f"bad value {value}: must be at least 1")
    return value
