"""The rich consoles evalkit prints through: results on stdout, progress and errors on stderr.

In a terminal rich fits the terminal's width. Written to a file or a pipe, rich would assume 80
columns and cut table cells short with an ellipsis; there tables and progress lines get their
natural width, up to PIPED_WIDTH. COLUMNS, if set, wins either way. Progress goes to stderr so
that ``evalkit run ... > results.txt`` holds the results alone.
"""

from __future__ import annotations

import os
import sys

from rich.console import Console

__all__ = ["PIPED_WIDTH", "console"]

PIPED_WIDTH = 240  # columns for output that goes to a file or a pipe (no terminal to fit)


def console(stderr: bool = False) -> Console:
    """A console for stdout, or with ``stderr`` for stderr, sized as described above."""
    stream = sys.stderr if stderr else sys.stdout
    piped = not (hasattr(stream, "isatty") and stream.isatty()) and "COLUMNS" not in os.environ
    return Console(stderr=stderr, width=PIPED_WIDTH if piped else None)
