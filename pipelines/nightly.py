"""Nightly fleet batch, the entry point cron or a systemd timer calls.

    .venv/bin/python -m pipelines.nightly ROOT -o FLEET [batch options]
    TRACELAB_ROOT=/data/logs TRACELAB_FLEET=/data/fleet .venv/bin/python -m pipelines.nightly

With no arguments, ROOT, FLEET and optionally the executor and scheduler come from the
environment (TRACELAB_ROOT, TRACELAB_FLEET, TRACELAB_EXECUTOR, TRACELAB_SCHEDULER). It runs
``tracelab batch --quiet`` and exits with its code: 0 ok, 3 some run failed, 2 usage. With
neither arguments nor TRACELAB_ROOT / TRACELAB_FLEET it prints one line and exits 2, so a
misconfigured scheduled job shows up red instead of green; ``--help`` shows the options.
"""

from __future__ import annotations

import os
import sys

from tracelab.cli import main as cli_main
from tracelab.errors import EXIT_USAGE

_ENV_OPTIONS = (("TRACELAB_EXECUTOR", "--executor"), ("TRACELAB_SCHEDULER", "--scheduler"),
                ("TRACELAB_CATALOG", "--catalog"))


def arguments(argv: list[str], env: dict[str, str]) -> list[str]:
    """The ``tracelab batch`` arguments for this invocation."""
    if argv:
        return ["batch", *argv, "--quiet"]
    if not env.get("TRACELAB_ROOT") or not env.get("TRACELAB_FLEET"):
        return []  # misconfigured: main() says so and exits 2
    args = ["batch", env["TRACELAB_ROOT"], "-o", env["TRACELAB_FLEET"], "--quiet"]
    for name, option in _ENV_OPTIONS:
        if env.get(name):
            args += [option, env[name]]
    return args


def main(argv: list[str] | None = None) -> int:
    args = arguments(sys.argv[1:] if argv is None else argv, dict(os.environ))
    if not args:
        missing = [name for name in ("TRACELAB_ROOT", "TRACELAB_FLEET")
                   if not os.environ.get(name)]
        print(f"tracelab nightly: no ROOT and FLEET: give 'ROOT -o FLEET' or set "
              f"{' and '.join(missing)} (--help shows the options)", file=sys.stderr)
        return EXIT_USAGE
    return cli_main(args)


if __name__ == "__main__":
    sys.exit(main())
