"""The ``cvdesign`` command: argument parser and sub-commands (:mod:`.commands`)."""

from .commands import EXIT_BROKEN_PIPE, build_parser, main

__all__ = ["main", "build_parser", "EXIT_BROKEN_PIPE"]
