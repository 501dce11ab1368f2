"""``python -m chainvigil.simulated_chains SCENARIO OUT [options]``: the same as ``chainvigil simulate``."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main(prog="python -m chainvigil.simulated_chains"))
