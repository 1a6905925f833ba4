"""``python -m realopt``: the same command line as ``realopt``."""
import sys

from .cli import main

sys.exit(main())
