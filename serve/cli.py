"""The ``demur`` command.

Subcommands that only need the runtime live in ``serve/`` and are registered
below; the torch-side ones (train, export, calibrate, bench) are found through
the ``demur.commands`` entry-point group, so ``serve/`` never imports
``export/`` and a runtime-only install simply lacks them.

Each registration function has the shape ``register(subparsers) -> None`` and
sets ``func`` on its parser: ``func(args) -> int`` (the exit status).
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Callable, Sequence
from importlib.metadata import entry_points

from demur.serve.errors import DemurError

__all__ = ["build_parser", "main"]

_BUILTIN = (
    ("serve", "demur.serve.web.server:register"),
    ("status", "demur.serve.offline.status:register"),
    ("score", "demur.serve.offline.scoring:register"),
)


def _load(ref: str) -> Callable[[argparse._SubParsersAction], None]:
    module, _, attr = ref.partition(":")
    return getattr(importlib.import_module(module), attr)


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The full ``demur`` parser; ``only`` (a built-in command name) registers just that
    command, so ``demur serve`` never imports the torch-side commands: a gunicorn master
    holding torch would hand its thread pools to every forked worker."""
    parser = argparse.ArgumentParser(
        prog="demur",
        description="Serve variational neural networks on CPU; abstain when unsure; route abstentions to people.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    registrations: list[tuple[str, str]] = list(_BUILTIN)
    if only in dict(_BUILTIN):
        registrations = [(only, dict(_BUILTIN)[only])]
    else:
        registrations += [(ep.name, ep.value) for ep in entry_points(group="demur.commands")]
    for name, ref in registrations:
        try:
            _load(ref)(sub)
        except ImportError as exc:
            missing = sub.add_parser(name, help=f"(unavailable: {exc.name} is not installed)")
            missing.set_defaults(func=lambda _a, _e=exc, _n=name: _unavailable(_n, _e))
    return parser


def _unavailable(name: str, exc: ImportError) -> int:
    print(f"demur: '{name}' needs {exc.name}, which is not installed; pip install 'demur[export]'", file=sys.stderr)
    return 2


def main(argv: Sequence[str] | None = None) -> int:
    words = list(sys.argv[1:] if argv is None else argv)
    first = words[0] if words and not words[0].startswith("-") else None
    parser = build_parser(only=first)
    args = parser.parse_args(words)
    try:
        return int(args.func(args) or 0)
    except DemurError as exc:
        print(f"demur {args.command}: {exc.message}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
