"""Command line: argument parsing, progress bars, exit codes, human and JSON output.

Exit codes (documented in the README):

  0  success (verify: identical)
  1  unexpected internal error
  2  usage error
  3  corrupt or inconsistent input (the message names the file)
  4  unsupported input (valid, but not something this version can move safely)
  5  verification failed (read-back mismatch, or verify found differences)
  6  unsafe target refused (not empty, inside the source, the source itself)
  7  the source looks like a running query
  130 interrupted
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from typing import Any

from tqdm import tqdm

from . import __version__
from .errors import StateshiftError, UsageError, VerificationFailed
from .providers import PROVIDER_NAMES
from .storage import mask_text, open_location, parse_storage_options, secret_values

EXIT_DIFFERENT = VerificationFailed.exit_code


def _parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--storage-option", "-o", action="append", default=[], metavar="KEY=VALUE",
        help="filesystem option for every location (repeatable; a.b=c nests)",
    )
    common.add_argument("--quiet", "-q", action="store_true", help="no progress bars, only errors and the result")
    common.add_argument("--json", action="store_true", help="print the result as one JSON document on stdout")

    p = argparse.ArgumentParser(
        prog="stateshift",
        description="Move the state of a stopped streaming query between state-store providers, offline.",
    )
    p.add_argument("--version", action="version", version=f"stateshift {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    c = sub.add_parser("convert", parents=[common], help="rebuild a checkpoint on another state-store provider")
    c.add_argument("source", metavar="SRC", help="checkpoint to read (local path or fsspec URL); never written")
    c.add_argument("target", metavar="DST", help="where to build the converted checkpoint")
    c.add_argument("--to", required=True, metavar="PROVIDER", help=f"target provider: {' | '.join(PROVIDER_NAMES)} | <provider class>")
    c.add_argument("--dry-run", action="store_true", help="print the plan as a diff and write nothing")
    c.add_argument("--overwrite", action="store_true", help="replace a non-empty DST")
    c.add_argument("--jobs", "-j", type=int, default=os.cpu_count() or 1, help="store partitions in parallel (default: cores)")
    c.add_argument("--target-storage-option", action="append", default=[], metavar="KEY=VALUE", help="filesystem option for DST only")

    i = sub.add_parser("inspect", parents=[common], help="show what a checkpoint holds")
    i.add_argument("source", metavar="SRC")
    i.add_argument("--rows", action="store_true", help="also rebuild every store partition and count rows (reads all state)")

    v = sub.add_parser("verify", parents=[common], help="compare the state of two checkpoints")
    v.add_argument("a", metavar="A")
    v.add_argument("b", metavar="B")
    return p


class _Progress:
    def __init__(self, enabled: bool, unit: str = "partition") -> None:
        self.enabled = enabled
        self.unit = unit
        self.bar: Any = None
        self.rows = 0

    def start(self, total: int) -> None:
        if self.enabled:
            self.bar = tqdm(total=total, unit=self.unit, file=sys.stderr, dynamic_ncols=True, leave=False)

    def step(self, result: Any = None) -> None:
        if result is not None and hasattr(result, "source_digest"):
            self.rows += result.source_digest.rows
        if self.bar is not None:
            self.bar.update(1)
            self.bar.set_postfix(rows=self.rows, refresh=False)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _emit(args: argparse.Namespace, payload: dict[str, Any], text: str) -> None:
    if args.json:
        print(json.dumps(payload, indent=2, sort_keys=False))
    else:
        print(text)


def _run(args: argparse.Namespace) -> int:
    options = parse_storage_options(args.storage_option)
    progress = _Progress(enabled=not args.quiet and not args.json and sys.stderr.isatty())
    try:
        if args.command == "convert":
            from .commands.convert import convert
            from .commands.render import render_convert

            if args.jobs < 1:
                raise UsageError("--jobs must be at least 1")
            target_options = {**options, **parse_storage_options(args.target_storage_option)}
            src = open_location(args.source, options, readonly=True)
            dst = open_location(args.target, target_options, readonly=args.dry_run)
            report = convert(
                src, dst, args.to, dry_run=args.dry_run, overwrite=args.overwrite, jobs=args.jobs,
                progress=progress.step, on_plan=progress.start,
            )
            progress.close()
            _emit(args, report.to_json(), render_convert(report))
            return 0
        if args.command == "inspect":
            from .commands.inspect import inspect, render

            info = inspect(open_location(args.source, options), rows=args.rows)
            _emit(args, info, render(info))
            return 0
        if args.command == "verify":
            from .commands.verify import render, verify

            result = verify(open_location(args.a, options), open_location(args.b, options), progress=progress.step)
            progress.close()
            _emit(args, result, render(result))
            return 0 if result["identical"] else EXIT_DIFFERENT
    finally:
        progress.close()
    raise UsageError(f"unknown command {args.command}")


def main(argv: list[str] | None = None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    secrets = secret_values(parse_storage_options(getattr(args, "storage_option", []) or []))
    try:
        secrets += secret_values(parse_storage_options(getattr(args, "target_storage_option", []) or []))
    except StateshiftError:
        pass
    try:
        return _run(args)
    except StateshiftError as exc:
        print(f"stateshift: error: {mask_text(str(exc), secrets)}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("stateshift: interrupted; the target (if any) is left marked incomplete", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the one place that turns crashes into an exit code
        text = mask_text(f"{type(exc).__name__}: {exc}", secrets)
        print(f"stateshift: internal error: {' '.join(text.split())}", file=sys.stderr)
        return 1
