"""``python -m contentlab``: the same command as ``contentlab``."""

from .cli import run

if __name__ == "__main__":
    run()
