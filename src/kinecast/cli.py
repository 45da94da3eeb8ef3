"""The ``kinecast`` command line.

Each verb lives in its own module with two functions: ``configure(parser)`` adds the verb's options
and ``run(args, cfg)`` does the work through the verb's Python function. This file only wires them
together, adds the options every verb shares (``--config FILE``, ``--set section.key=value``), and
turns :class:`~kinecast.errors.KinecastError` into one line on stderr and exit status 2.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from . import __version__
from .errors import EXIT_BAD_INPUT, KinecastError

# verb -> (module, one-line help). Modules are imported lazily: torch is slow to import.
VERBS = {
    "rig": ("kinecast.rigs.cli", "render a synthetic lab rig recording with ground truth"),
    "inspect": ("kinecast.frames.cli", "summarise a recording: frames, size, timing, dropped frames"),
    "fit": ("kinecast.train.cli", "train a latent ODE model on one or more recordings"),
    "forecast": ("kinecast.forecast.cli", "extrapolate frames from a trained run and render a clip"),
    "fill": ("kinecast.forecast.fill_cli", "fill dropped frames of a recording from a trained run"),
    "score": ("kinecast.score.cli", "score predictions against held-out frames, with baselines"),
    "report": ("kinecast.score.report", "write one HTML page for a run"),
    "config": ("kinecast.config_cli", "print the default configuration or every key with its help"),
}


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line with exit status 2."""

    def error(self, message: str):  # pragma: no cover - exercised through main()
        raise KinecastError(self.prog, message)


def _load_module(verb: str):
    return importlib.import_module(VERBS[verb][0])


def build_parser(verbs: list[str] | None = None) -> argparse.ArgumentParser:
    parser = _Parser(prog="kinecast", description="Forecast, fill and score lab camera recordings "
                     "with a learned second-order latent ODE. Predictions are statistical "
                     "extrapolations, not measurements.")
    parser.add_argument("--version", action="version", version=f"kinecast {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_Parser)
    for verb in verbs or VERBS:
        module_name, help_text = VERBS[verb]
        p = sub.add_parser(verb, help=help_text, description=help_text)
        p.add_argument("--config", metavar="FILE", help="TOML config file (missing keys keep defaults)")
        p.add_argument("--set", dest="overrides", action="append", default=[], metavar="SECTION.KEY=VALUE",
                       help="override one config key; may be repeated")
        try:
            _load_module(verb).configure(p)
        except ModuleNotFoundError as exc:
            if exc.name != module_name:
                raise
            p.set_defaults(_missing=True)
    return parser


def resolve_config(args: argparse.Namespace):
    """The config a verb runs with: defaults ← ``--config FILE`` ← ``--set`` overrides."""
    from . import config as cfgmod

    cfg = cfgmod.load(args.config) if getattr(args, "config", None) else cfgmod.Config()
    return cfgmod.apply_overrides(cfg, getattr(args, "overrides", []))


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    try:
        # Only build the chosen verb's parser so other verbs' imports are not paid for.
        chosen = [a for a in argv if a in VERBS][:1]
        parser = build_parser(chosen if chosen and not {"-h", "--help"} & set(argv[:1]) else None)
        args = parser.parse_args(argv)
        if not args.verb:
            parser.print_help()
            return EXIT_BAD_INPUT
        if getattr(args, "_missing", False):
            raise KinecastError(f"kinecast {args.verb}", "this verb is not available in this build yet")
        cfg = resolve_config(args)
        result = _load_module(args.verb).run(args, cfg)
        return int(result or 0)
    except KinecastError as exc:
        print(f"kinecast: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as exc:  # a file-system failure no check foresaw (disk full, ...): one line too
        print(f"kinecast: error: {exc.filename or 'kinecast'}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("kinecast: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
