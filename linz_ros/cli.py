"""The ``linz`` command: analyse plants from the terminal.

Verbs
-----
check   decide whether and where a plant can be feedback linearized

Exit codes: 0 when the work ran (whatever the verdict), 2 for bad input (one line on
stderr naming the file, the field and the problem), 1 for an internal error.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Sequence

from linz_ros import __version__
from linz_ros.errors import LinzError

__all__ = ["main"]


class _OneLineParser(argparse.ArgumentParser):
    """Argument errors as one line and exit code 2, like every other user mistake."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"{self.prog}: {message} (see --help)\n")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a number of at least 1, got {value}")
    return value


def _build_parser() -> argparse.ArgumentParser:
    parser = _OneLineParser(prog="linz", description="Feedback linearization, from plant file to ROS 2 node.")
    parser.add_argument("--version", action="version", version=f"linz_ros {__version__}")
    verbs = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_OneLineParser)
    verbs.required = True
    check = verbs.add_parser("check", help="analyse a plant's linearizability",
                             description="Decide whether and where a plant can be feedback linearized.")
    check.add_argument("plant", metavar="PLANT", help="plant file (YAML)")
    check.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    check.add_argument("--samples", type=_positive_int, default=1024,
                       help="envelope samples for the conditioning sweep (default 1024)")
    check.set_defaults(run=_run_check)
    return parser


def _run_check(args: argparse.Namespace) -> int:
    from linz_ros.analysis import analyse, render_text
    from linz_ros.model import load_plant

    report = analyse(load_plant(args.plant), samples=args.samples)
    if args.json:
        print(json.dumps(report.to_json(), indent=2))
    else:
        print(render_text(report))
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``linz`` console script.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; ``sys.argv[1:]`` when None.

    Returns
    -------
    int
        The exit code.
    """
    args = _build_parser().parse_args(argv)
    try:
        return args.run(args)
    except LinzError as err:
        print(f"linz: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("linz: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
