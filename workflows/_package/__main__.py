"""``python -m swathmill``: the command line, as the ``swathmill`` script."""
import sys

from swathmill.workflows.app.cli import main

if __name__ == "__main__":
    sys.exit(main())
