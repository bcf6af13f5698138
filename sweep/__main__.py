"""``python -m sweep`` is the same program as the ``sweep`` command."""
import sys

from .cli import main

sys.exit(main())
