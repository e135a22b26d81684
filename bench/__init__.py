"""emission-bench: repeatable radiated-emission pre-scans on a bench or a simulated bench.

A pre-scan is an estimate, not a compliance verdict: defer to the applicable standard, an
accredited test house and local regulations.
"""

__version__ = "0.1.0"
