"""The ``quaywatch`` command line: one thin module per verb group over library calls.

``app`` assembles the verb groups and is the only place that turns the library's errors into
one-line messages and exit codes; ``common`` holds the argument helpers the verbs share.
"""
from monitor.cli.app import build_parser, main

__all__ = ["build_parser", "main"]
