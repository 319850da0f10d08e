"""The ``keelson`` command (the console script and ``python -m service``).

Signal handling comes first, before the command line's own imports, so a
long-running command stops cleanly on SIGTERM from its first instant
(service.process).
"""

import sys

from service.process import take_stop_signals_for


def main() -> None:
    take_stop_signals_for(sys.argv[1:])
    from service.tools.cli import main as run_cli

    run_cli()


if __name__ == "__main__":
    main()
