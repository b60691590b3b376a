"""Entry point of ``python -m batch``: runs :func:`batch.cli.main` and exits with its code."""

import sys

from batch.cli import main

if __name__ == "__main__":
    sys.exit(main())
