import sys

from windowfinder.cli import main

sys.exit(main())
