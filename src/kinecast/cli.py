"""The ``kinecast`` command line.

Each verb lives in its own module with two functions: ``configure(parser)`` adds the verb's options
and ``run(args, cfg)`` does the work through the verb's Python function. This file only wires them
together, adds the options every verb shares (``--config FILE``, ``--set section.key=value``), and
turns :class:`~kinecast.errors.KinecastError` into one line on stderr and exit status 2. A misspelled
verb, option or config key gets a "did you mean ...?" hint; a reader that closes the pipe early
(``kinecast inspect REC | head -2``) ends the command quietly.
"""

from __future__ import annotations

import argparse
import importlib
import os
import signal
import sys

from . import __version__
from .errors import EXIT_BAD_INPUT, KinecastError, did_you_mean

PROG = "kinecast"
# A command whose reader went away ends as if killed by SIGPIPE: the shell reports 128 + signal
# number (POSIX shell "Exit Status"; 141 on Linux, as for `yes | head -1`). Common practice.
EXIT_BROKEN_PIPE = 128 + getattr(signal, "SIGPIPE", 13)

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
    """argparse that reports usage errors as one line with exit status 2, with spelling hints."""

    def error(self, message: str):  # pragma: no cover - exercised through main()
        raise KinecastError(self.prog, message)

    def _check_value(self, action, value):
        # overrides argparse's (private) check of choices, to reword it with a hint for a misspelled
        # verb or choice; the same check as argparse's: the value must be one of action.choices
        if action.choices is not None and value not in action.choices:
            choices = ", ".join(map(str, action.choices))
            hint = did_you_mean(value, action.choices)
            if action.dest == "verb":
                raise argparse.ArgumentError(None, f"unknown verb {value!r}{hint}: choose from {choices}")
            raise argparse.ArgumentError(action, f"invalid choice {value!r}{hint}: choose from {choices}")

    def parse_args(self, args=None, namespace=None):
        """Like argparse's, but unknown options name the verb and the closest known option."""
        ns, extras = self.parse_known_args(args, namespace)
        if extras:
            verb = getattr(ns, "verb", None)
            known = [o for p in (self, getattr(self, "verb_parsers", {}).get(verb)) if p for a in p._actions
                     for o in a.option_strings]
            hints = "".join(did_you_mean(x.partition("=")[0], known) for x in extras if x.startswith("-"))
            noun = "argument" if len(extras) == 1 else "arguments"
            raise KinecastError(f"{PROG} {verb}" if verb else self.prog,
                                f"unrecognized {noun}: {' '.join(extras)}{hints}")
        return ns


def _load_module(verb: str):
    return importlib.import_module(VERBS[verb][0])


def build_parser(verbs: list[str] | None = None) -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Forecast, fill and score lab camera recordings "
                     "with a learned second-order latent ODE. Predictions are statistical "
                     "extrapolations, not measurements.")
    parser.add_argument("--version", action="version", version=f"kinecast {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_Parser)
    parser.verb_parsers = {}  # verb -> its parser, for the options named in spelling hints
    for verb in verbs or VERBS:
        module_name, help_text = VERBS[verb]
        p = sub.add_parser(verb, help=help_text, description=help_text)
        parser.verb_parsers[verb] = p
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


def error_line(exc: KinecastError) -> str:
    """The one stderr line for bad input: ``kinecast: error: ...`` with the program named once."""
    thing = exc.thing or ""
    if thing == PROG:
        text = exc.problem
    elif thing.startswith(PROG + " "):  # "kinecast fit" -> "fit: ..."
        text = f"{thing[len(PROG) + 1:]}: {exc.problem}"
    else:
        text = str(exc)
    return f"{PROG}: error: {text}"


def _silence_stdout() -> None:
    """Point stdout at the null device so that Python's final flush cannot fail again.

    The recipe of the Python docs' "Note on SIGPIPE" (library/signal.html).
    """
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # no real file behind stdout (e.g. captured)
        pass


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
            raise KinecastError(f"{PROG} {args.verb}", "this verb is not available in this build yet")
        cfg = resolve_config(args)
        result = _load_module(args.verb).run(args, cfg)
        sys.stdout.flush()  # a closed pipe shows up here, not in Python's final flush
        return int(result or 0)
    except KinecastError as exc:
        print(error_line(exc), file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:  # the reader of stdout has gone (`| head`): stop quietly
        _silence_stdout()
        return EXIT_BROKEN_PIPE
    except OSError as exc:  # a file-system failure no check foresaw (disk full, ...): one line too
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"{PROG}: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("kinecast: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
