"""``python -m pretrial``: the same command line as the ``pretrial`` script."""

import sys

from pretrial.cli.main import main

if __name__ == "__main__":
    sys.exit(main())
