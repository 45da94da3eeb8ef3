"""``kinecast config``: print the configuration a verb would run with, or every key with its help."""

from __future__ import annotations

from . import config as cfgmod


def configure(parser) -> None:
    parser.add_argument("--keys", action="store_true", help="list every key with its default and help")
    parser.add_argument("--out", metavar="FILE", help="write the TOML here instead of printing it")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing --out file")


def run(args, cfg) -> int:
    if args.keys:
        print(cfgmod.help_keys())
    elif args.out:
        cfgmod.save(cfg, args.out, overwrite=args.overwrite)
        print(f"wrote {args.out}")
    else:
        print(cfgmod.to_toml_text(cfg), end="")
    return 0
