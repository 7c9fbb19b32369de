"""The synthetic run renderer: the oracle, kept apart from the analysis.

Scenario files, truth motion with injected faults, encoder / IMU / log-clock synthesis,
image synthesis and the run-folder writer. Analysis modules never import this package
(``tests/test_layout.py`` checks it); only the ``demo`` and ``render`` verbs, the tests
and the benchmarks do.
"""
