"""``python -m forebear``: the command line."""

from forebear.face.cli import main

if __name__ == "__main__":
    main()
