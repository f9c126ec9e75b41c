"""Benchmarks, not timed tests.

`python -m edgevib.bench` measures the pipeline, `python -m edgevib.bench.daemon` the daemon end to end.
"""
