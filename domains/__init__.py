"""cdw-domains: domains, walls, drift, twist angle and bias contrast of periodic electronic order in STM data.

Public names are listed here once; the modules of the analysis steps (``domains.io``,
``domains.level``, ``domains.fourier``, ``domains.order``, ... see docs/README.md) hold the steps.
Names are imported on first use (PEP 562), so ``import domains`` and ``domains --help`` do not
load numpy, scipy or matplotlib before they are needed.
"""

from importlib import import_module
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("cdw-domains")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

_WHERE = {
    "InputError": "._errors",
    "Scan": "._scan",
    "pixel_size_pair": "._scan",
    "amplitude": "._lockin",
    "choose_sigma": "._lockin",
    "local_wavevector": "._lockin",
    "lockin": "._lockin",
    "lossless_step": "._lockin",
    "phase": "._lockin",
    "phase_gradient": "._lockin",
    "trusted_mask": "._lockin",
}

__all__ = sorted(_WHERE) + ["__version__"]


def __getattr__(name):
    if name in _WHERE:
        value = getattr(import_module(_WHERE[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'domains' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_WHERE))
