"""The `vservo` command: one entry point, sub-commands discovered in vservo_node.commands."""
from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys

from vservo_node import commands


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="vservo",
        description="Image-based visual servoing for eye-in-hand arms: tools around the node.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for info in sorted(pkgutil.iter_modules(commands.__path__), key=lambda m: m.name):
        module = importlib.import_module(f"{commands.__name__}.{info.name}")
        register = getattr(module, "register", None)
        if register is not None:
            register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
