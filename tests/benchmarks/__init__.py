"""Benchmarks of the engine at scale (not collected by the default test run).

Run ``python -m tests.benchmarks.bench_engine [--quick] [--memory]`` from the
repository root; see ``tests/benchmarks/README.md``.
"""
