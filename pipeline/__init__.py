"""isogap: calibrated height maps from a night of raw STM scans.

The public Python API. Import package ``pipeline``; command ``isogap``.
"""

from pipeline._version import __version__

__all__ = ["__version__"]
