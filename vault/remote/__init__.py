"""The vault behind `mindward serve`, as a client sees it: `connect(url, token)` returns a
RemoteVault with the local Vault's method names and documents (notebooks, the CLI's --server).

Imported only when a service is used: `import vault` and `mindward --help` never load httpx.
"""

from __future__ import annotations

from vault.remote.client import RemoteVault, connect

__all__ = ["RemoteVault", "connect"]
