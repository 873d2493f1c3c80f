"""``python -m adfit``: the command line (the same as the ``adfit`` script)."""

from .cli import main

if __name__ == "__main__":
    main()
