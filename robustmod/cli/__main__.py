"""``python -m robustmod.cli``: the same as the ``robustmod`` command."""
from . import run

run()
