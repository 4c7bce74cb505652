"""The ``veil`` command: parse, run one subcommand, map failures to exit codes.

Exit 0 on success, 2 on bad usage or input (a missing file, an unknown name,
a refused promotion), 1 on any other failure (a damaged version, a lock held
too long, an I/O error).  Errors go to stderr as one line, without a
traceback; set ``VEIL_DEBUG=1`` to see the traceback of an unexpected one.

May import every stage below it; nothing imports it.  Commands import the
heavy stages (fitting, reports, the service) only when they run, so that
``veil versions`` starts fast.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence

from veil.cli.commands import HANDLERS
from veil.cli.parser import parse_arguments
from veil.cli.progress_bars import ProgressBars
from veil.errors import DataError
from veil.progress import reporting
from veil.registry import (
    IntegrityError,
    InvalidReferenceError,
    NotFoundError,
    PromotionError,
    RegistryError,
    RegistryLocationError,
)

BAD_INPUT = (DataError, InvalidReferenceError, NotFoundError, PromotionError, RegistryLocationError)


def main(argv: Sequence[str] | None = None) -> int:
    args = parse_arguments(None if argv is None else list(argv))
    show_progress = args.progress == "always" or (args.progress == "auto" and sys.stderr.isatty())
    try:
        with ProgressBars(enabled=show_progress) as bars, reporting(bars):
            return HANDLERS[args.handler](args)
    except BAD_INPUT as error:
        print(f"veil {args.command}: {error}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # The reader of stdout left early (`veil show ... | head`): not a failure worth a message.  Python's
        # documented handling: point stdout at devnull so the final flush at exit cannot fail again; the
        # status is the shell's for a process ended by SIGPIPE (128 + 13).
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
    except (IntegrityError, RegistryError, OSError) as error:
        print(f"veil {args.command}: {error}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"veil {args.command}: interrupted", file=sys.stderr)
        return 130
    except Exception as error:
        if os.environ.get("VEIL_DEBUG"):
            raise
        print(f"veil {args.command}: unexpected failure: {type(error).__name__}: {error}", file=sys.stderr)
        return 1
