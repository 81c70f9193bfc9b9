"""Benchmarks of mindward (installed as `mindward_bench`; the runtime package never imports it)."""
