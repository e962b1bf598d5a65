"""One-line error reporting for the CLI (no tracebacks for expected failures)."""
from __future__ import annotations

import sys


def fail(message: str, code: int) -> int:
    """Print ``modetick: <message>`` on stderr (first line only) and return the exit code."""
    line = " ".join(str(message).split())
    print(f"modetick: {line}", file=sys.stderr)
    return code
