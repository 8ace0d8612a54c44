"""`python -m calcium` runs the command-line tool."""
import sys

from calcium.cli import main

sys.exit(main())
