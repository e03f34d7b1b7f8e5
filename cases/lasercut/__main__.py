"""``python -m windowfinder.cases.lasercut IN OUT [--seed N]``: simulate runs (see windowfinder.cases.entry)."""

import sys

from windowfinder.cases import load_simulator
from windowfinder.cases.entry import main

if __name__ == "__main__":
    sys.exit(main(load_simulator("lasercut"), "lasercut"))
