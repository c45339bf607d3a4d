"""``python -m stimkit``: the same command line as the ``stimkit`` script."""

from .cli import run

if __name__ == "__main__":  # pragma: no cover
    run()
