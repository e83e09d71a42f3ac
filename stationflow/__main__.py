"""``python -m stationflow``: the command line."""

from .cli import main

main()
