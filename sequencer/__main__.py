"""``python -m sequencer`` runs the lightloom command line."""

import sys

from sequencer.cli import main

sys.exit(main())
