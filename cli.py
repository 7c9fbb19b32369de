"""Run vidodo from a checkout: ``python cli.py VERB ...`` (same as the ``vidodo`` command)."""

import sys

from vidodo.cli_main import main

if __name__ == "__main__":
    sys.exit(main())
