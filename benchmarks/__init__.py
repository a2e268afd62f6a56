"""hemostream's benchmark harness: four figures, each a ratio against a baseline measured in
the same run (machines differ; ratios travel).

    python -m benchmarks.run [--quick] [--out benchmarks/results.json]

See docs/performance.md for what each figure measures, how, and the last measured table.
Nothing here is a timed unit test; ``tests/test_bench_smoke.py`` only checks that the
harness runs and that its figures are sane.
"""
