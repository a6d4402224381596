"""``python -m forebear``: the command line."""

from forebear.cli import main

if __name__ == "__main__":
    main()
