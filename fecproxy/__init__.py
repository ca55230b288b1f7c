"""fecproxy: forward error correction for UDP across lossy links.

Public library API (stable): :class:`fecproxy.codec.BlockCode`.
"""

__version__ = "0.1.0"
