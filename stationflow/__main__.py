"""``python -m stationflow``: the command line."""

from .cli import main

if __name__ == "__main__":  # not when a worker process imports this module
    main()
