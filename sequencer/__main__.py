"""``python -m lightloom.sequencer`` runs the lightloom command line."""

import sys

from lightloom.sequencer.cli import main

sys.exit(main())
