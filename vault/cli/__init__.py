"""The `mindward` command: parse -> one library call -> render (text or --json)."""

from vault.cli.app import app, main

__all__ = ["app", "main"]
