"""Run the command-line interface: python -m trainkit."""

import sys

from .cli import main

sys.exit(main())
