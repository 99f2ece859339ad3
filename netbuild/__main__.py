"""Runs the command line: ``python -m netbuild``."""

from .cli import main

main()
