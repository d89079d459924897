"""The ``grainwright`` command. Sub-commands live one per module in ``grainwright.console.commands``.

Every command module is torch-free at import time and exposes ``HELP`` (one line), ``add_arguments(parser)``
and ``run(args) -> int``, and optionally ``EPILOG`` (text shown after its options). Commands that train or
export load the torch half inside ``run``.
"""
from __future__ import annotations

import argparse
import importlib
import sys
from types import ModuleType

from grainwright.console import HELP_CAUTION
from grainwright.inference import __version__
from grainwright.inference.common.errors import GrainwrightError
from grainwright.inference.runtime.faults import os_error_line

COMMANDS: dict[str, str] = {
    "inspect": "grainwright.console.commands.inspect",
    "train": "grainwright.console.commands.train",
    "export": "grainwright.console.commands.export",
    "starting-model": "grainwright.console.commands.starting_model",
    "info": "grainwright.console.commands.info",
    "denoise": "grainwright.console.commands.denoise",
    "watch": "grainwright.console.commands.watch",
    "compare": "grainwright.console.commands.compare",
    "demo": "grainwright.console.commands.demo",
    "bench": "grainwright.console.commands.bench",
}


def _load(name: str) -> ModuleType:
    return importlib.import_module(COMMANDS[name])


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """Build the parser; with ``only`` set, import just that command's module."""
    parser = argparse.ArgumentParser(
        prog="grainwright",
        description="Train small image denoisers on a CPU, export them to ONNX, run them tiled, "
        "and compare them against classical filters.",
        epilog=HELP_CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"grainwright {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        if only is not None and name != only:
            subparsers.add_parser(name)
            continue
        module = _load(name)
        sub = subparsers.add_parser(name, help=module.HELP, description=module.HELP,
                                    epilog=getattr(module, "EPILOG", None))
        module.add_arguments(sub)
        sub.set_defaults(handler=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    chosen = argv[0] if argv and argv[0] in COMMANDS else None
    parser = build_parser(only=chosen)
    args = parser.parse_args(argv)
    if getattr(args, "handler", None) is None:
        parser.print_help()
        return 2
    try:
        return int(args.handler(args) or 0)
    except GrainwrightError as error:
        print(f"grainwright {args.command}: error: {error}", file=sys.stderr)
        return 2
    except OSError as error:  # a full disk, a read-only mount, a permission: one line, not a traceback
        print(f"grainwright {args.command}: error: {os_error_line(error)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"grainwright {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
