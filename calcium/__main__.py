"""`python -m calcium` runs the command-line tool."""
import sys

from calcium.cli import main

if __name__ == "__main__":
    sys.exit(main())
