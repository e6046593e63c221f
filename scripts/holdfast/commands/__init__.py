"""The everyday commands beside run/open/audit/check: status, predict, init, log, list and compare.

Each lives in its own module with an ``add_parser(sub)`` and a ``main(args) -> int``; :func:`add_parsers`
registers them all with the ``holdfast`` command's parser (cli.build_parser).
"""

from __future__ import annotations

from typing import Any


def add_parsers(sub: Any) -> None:
    """Add every everyday command to the subcommand parser, in the order `holdfast --help` lists them."""
    from . import listing, predict, starter, status, timeline

    for module in (status, predict, starter, timeline, listing):
        module.add_parser(sub)
