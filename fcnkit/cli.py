"""Command-line interface: a thin argparse layer over the public API.

Every error caused by the user's input is printed as one line on stderr and exits with status 2.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Sequence

from fcnkit.errors import FcnkitError


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2 (argparse's default prints usage too)
        sys.stderr.write(f"{self.prog}: error: {message}\n")
        raise SystemExit(2)


def _describe(args: argparse.Namespace) -> int:
    from fcnkit import describe, load_config
    from fcnkit.describe import format_description

    for i, path in enumerate(args.configs):
        d = describe(load_config(path))
        if args.json:
            print(json.dumps({"config": path, **d}))
        else:
            print(("\n" if i else "") + f"== {path}\n" + format_description(d))
    return 0


def _add_describe(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("describe", help="print a net's stride, receptive field, tile margin, size and cost")
    p.add_argument("configs", nargs="+", metavar="CONFIG", help="TOML config file(s)")
    p.add_argument("--json", action="store_true", help="print one JSON object per config instead of a table")
    p.set_defaults(run=_describe)


def _export(args: argparse.Namespace) -> int:
    from fcnkit import export_model

    print(export_model(args.model, args.out, args.format).summary())
    return 0


def _add_export(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("export", help="write a model file as ONNX or TorchScript (any height and width), checked")
    p.add_argument("model", metavar="MODEL", help="model file (.safetensors) written by fcnkit")
    p.add_argument("--format", choices=("onnx", "torchscript"), default="onnx", help="output format (default onnx)")
    p.add_argument("--out", required=True, metavar="FILE", help="where to write the exported net")
    p.set_defaults(run=_export)


COMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [_add_describe, _add_export]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="fcnkit", description="Fully convolutional segmentation nets on the CPU.")
    from fcnkit import __version__

    parser.add_argument("--version", action="version", version=f"fcnkit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for add in COMMANDS:
        add(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.run(args) or 0)
    except FcnkitError as e:
        sys.stderr.write(f"fcnkit {args.command}: error: {e}\n")
        return 2
    except OSError as e:
        where = f"{e.filename}: " if getattr(e, "filename", None) else ""
        sys.stderr.write(f"fcnkit {args.command}: error: {where}{e.strerror or e}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"fcnkit {args.command}: interrupted\n")
        return 130
