"""kinecast benchmarks: speed, efficiency, memory, video reading and forecast quality in one run.

Run ``python bench/run_all.py`` (``make bench``) or ``--quick`` (``make bench-quick``).
"""
