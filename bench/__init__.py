"""flipfix benchmarks: repair versus re-solving, greedy kernel, service overhead, memory, mixes.

Entry point: ``python -m bench.run [--quick] [--only NAME]``. Never part of the test suite.
"""

#: the order sections run and are reported in
SECTIONS_ORDER = ("repair", "kernel", "service", "memory", "mix", "grow")
