"""``python -m codeseek``: the command line."""

from codeseek.cli import run

run()
