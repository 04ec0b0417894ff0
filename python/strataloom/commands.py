"""The CLI's subcommands. Each is a thin wrapper over the Python API."""

from __future__ import annotations
