"""``python -m timbrel``: the same as the ``timbrel`` command."""

from timbrel.cli import run

run()
