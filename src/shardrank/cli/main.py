"""Entry point: parse arguments, run one command, turn library errors into exit codes.

``main(argv) -> int`` is testable in process; ``entry()`` is the console script.
"""

from __future__ import annotations

import sys
import traceback
from collections.abc import Sequence

from ..errors import ShardrankError
from ..progress import JsonReporter, Reporter, TextReporter
from .parser import build_parser


def _reporter(args: object) -> Reporter:
    if getattr(args, "log_format", "text") == "json":
        return JsonReporter()
    if getattr(args, "quiet", False):
        return Reporter()
    return TextReporter()


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI with ``argv`` (default: sys.argv[1:]); return the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    rep = _reporter(args)
    try:
        return int(args.func(args, rep) or 0)
    except ShardrankError as e:
        rep.done()
        if isinstance(rep, JsonReporter):
            rep.event("error", e.message, hint=e.hint, exit_code=e.exit_code, error=type(e).__name__)
        else:
            print(f"error: {e.message}", file=sys.stderr)
            if e.hint:
                print(f"hint:  {e.hint}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        rep.done()
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except Exception:  # a bug: keep the traceback, say so
        rep.done()
        traceback.print_exc()
        print("error: unexpected internal error (this is a bug in shardrank; please report it "
              "with the traceback above)", file=sys.stderr)
        return 1


def entry() -> None:
    sys.exit(main())
