"""The append-only Merkle log and every signed document (tree heads, manifests, receipts)."""
