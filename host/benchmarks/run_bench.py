"""`make bench`: every benchmark, ratios measured in this one run, printed as JSON."""

import sys

from feedmatch.cli import main

if __name__ == "__main__":
    sys.exit(main(["bench", "--json", *sys.argv[1:]]))
