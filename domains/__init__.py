"""cdw-domains: domains, walls, drift, twist angle and bias contrast of periodic electronic order in STM data.

Public names are listed here once; the modules of the analysis steps (``domains.io``,
``domains.level``, ``domains.fourier``, ``domains.order``, ... see docs/README.md) hold the steps.
Names (and ``__version__``, read from the installed metadata) are imported on first use
(PEP 562), so ``import domains`` and ``domains --help`` do not load numpy, scipy, matplotlib,
napari or dask before they are needed (tests/test_imports.py checks it).
"""

from importlib import import_module

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


def _version():
    # importlib.metadata costs more than the rest of ``import domains``: read it on first use.
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("cdw-domains")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0.0.0+unknown"


def __getattr__(name):
    if name == "__version__":
        globals()[name] = value = _version()
        return value
    if name in _WHERE:
        value = getattr(import_module(_WHERE[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'domains' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_WHERE) | {"__version__"})
