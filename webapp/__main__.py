"""``python -m webapp``: the same as ``rateferry serve`` (extra arguments go to serve)."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main(["serve", *sys.argv[1:]]))
