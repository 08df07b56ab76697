"""cdw-domains: domains, walls, drift, twist angle and bias contrast of periodic electronic order in STM data.

Public names are listed here once; the modules named in DESIGN.md (``domains.io``,
``domains.level``, ``domains.fourier``, ...) hold the steps of the analysis.
"""

from importlib.metadata import PackageNotFoundError, version

from ._errors import InputError
from ._lockin import (
    amplitude,
    choose_sigma,
    local_wavevector,
    lockin,
    phase,
    phase_gradient,
    trusted_mask,
)
from ._scan import Scan, pixel_size_pair

try:
    __version__ = version("cdw-domains")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

__all__ = [
    "InputError",
    "Scan",
    "amplitude",
    "choose_sigma",
    "local_wavevector",
    "lockin",
    "phase",
    "phase_gradient",
    "pixel_size_pair",
    "trusted_mask",
    "__version__",
]
