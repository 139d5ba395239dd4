"""``python -m robustmod.cli``: the same as the ``robustmod`` command."""
import sys

from . import main

sys.exit(main())
