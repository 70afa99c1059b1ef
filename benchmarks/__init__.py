"""Benchmark scripts: run one as ``python benchmarks/NAME.py``; ``wmplan bench`` runs them all."""
