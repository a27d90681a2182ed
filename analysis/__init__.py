"""LatentDesk numeric core: intake, preprocessing, PCA, diagnostics, rank choice.

Depends on numpy, scipy and pandas, and on scikit-learn (``MinCovDet``) for robust
PCA only; never on web or storage code.
"""

__version__ = "0.2.0"
