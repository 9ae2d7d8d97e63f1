"""imgreduce: eigen-image bases for large sets of same-size images.

Fit one basis of eigen-images (principal components fitted by randomized SVD) to a set of
images from one fixed setup, then use it to compress the set at a known quality, to screen
frames that do not fit and show where, and to choose how many components to keep.
"""

__version__ = "0.1.0"

from .basis import EigenBasis, fit_basis  # noqa: E402
from .errors import (BasisFileError, ImgreduceError, InputError,  # noqa: E402
                     ModelMismatchError, ParameterError)
from .ingest import ImageStack, read_images  # noqa: E402
from .screen import (Calibration, ScreenResult, calibrate, screen_batch,  # noqa: E402
                     screen_images)

__all__ = [
    "__version__",
    "EigenBasis",
    "fit_basis",
    "ImageStack",
    "read_images",
    "calibrate",
    "Calibration",
    "screen_images",
    "screen_batch",
    "ScreenResult",
    "ImgreduceError",
    "InputError",
    "ParameterError",
    "BasisFileError",
    "ModelMismatchError",
]
