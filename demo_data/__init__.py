"""Synthetic demo study (invented people, invented lab): see demo_data/README.md."""
