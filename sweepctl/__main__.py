"""``python -m sweepctl``."""

from sweepctl.cli import main

main()
