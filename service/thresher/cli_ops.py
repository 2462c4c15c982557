"""Operator subcommands of ``thresher`` (models, quality, snapshots, rebuild, replay, demo)."""

from __future__ import annotations

import argparse
from typing import Any


def register(sub: Any) -> None:
    """Add the operator subcommands to the ``thresher`` parser."""
    del sub


__all__ = ["argparse", "register"]
