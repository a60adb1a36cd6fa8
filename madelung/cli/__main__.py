"""``python -m madelung.cli``: the same as the ``madelung`` command."""

import sys

from .main import main

if __name__ == "__main__":
    sys.exit(main())
