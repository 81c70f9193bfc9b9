"""SQLite and ciphertext files, never keys: schema, SQL, atomic files."""
