"""LatentDesk numeric core: intake, preprocessing, PCA, diagnostics, rank choice.

Depends on numpy, scipy and pandas only; never on web or storage code.
"""

__version__ = "0.1.0"
