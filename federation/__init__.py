"""Coordinator side of the multi-site validation tool.

Only :mod:`federation.protocol` is shared with the site agent; everything else here runs at the coordinator.
"""

__version__ = "0.1.0"
