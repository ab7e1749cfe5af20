"""`python -m seedbed_client ...`: the command line for installs without the service."""

import sys

from seedbed_client.cli import main

sys.exit(main())
