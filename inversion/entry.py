"""The ``planetmix`` console script: a light first module.

The command's own code (:mod:`inversion.cli`) imports numpy, pandas and, through the
sub-commands, the solvers: about a second before ``main`` runs. A Ctrl-C in that time
used to end with Python's KeyboardInterrupt traceback. This module imports nothing
heavy (``import inversion`` is lazy), so the window left before the handling below is
the interpreter's own start-up, a few tens of milliseconds in which nothing is written.
"""

from __future__ import annotations

import sys

__all__ = ["main"]

#: Exit status of an interrupted run (as :data:`inversion.cli.EXIT_INTERRUPTED`).
EXIT_INTERRUPTED = 130


def main(argv: list[str] | None = None) -> int:
    """Run the ``planetmix`` command; a Ctrl-C while it loads exits 130 with one line.

    Parameters
    ----------
    argv : list of str, optional
        The arguments (default ``sys.argv[1:]``).

    Returns
    -------
    int
        The exit status (:mod:`inversion.cli`).
    """
    try:
        from .cli import main as cli_main
    except KeyboardInterrupt:
        print("planetmix: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    status = cli_main(argv)
    # the run is over and its output complete: a Ctrl-C during the interpreter's
    # shutdown (threads, atexit) changes nothing, so it no longer prints a traceback
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    return status


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
