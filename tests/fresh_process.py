"""A Python snippet run in a fresh interpreter on this checkout (what a command-line process or
a new worker sees: nothing imported yet)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

#: Appended to a snippet: prints which of the named modules the snippet has loaded.
LOADED = ("print(' '.join(m for m in ({modules}) if m in sys.modules))")


def run_fresh(code: str, *args, modules: tuple[str, ...] = (), timeout: float = 300
              ) -> subprocess.CompletedProcess:
    """Run ``code`` (which may use ``sys.argv[1:]`` = ``args``); with ``modules`` its last
    line of output names those of them it loaded."""
    if modules:
        code = f"import sys; {code}; " + LOADED.format(
            modules=", ".join(repr(m) for m in modules) + ",")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-c", code, *map(str, args)], env=env,
                          capture_output=True, text=True, timeout=timeout)
