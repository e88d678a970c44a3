"""``python -m rigcast``: parse the command line and run one subcommand."""

import sys

from rigcast.commands.cli import main

# The guard matters: worker processes started with "spawn" (the build's sampling pool) import
# this module again as __mp_main__, and must not run the command a second time.
if __name__ == "__main__":
    sys.exit(main())
