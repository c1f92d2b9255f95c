"""calib: put survey catches taken with different gears onto one footing.

Pipeline (one module per stage, data flows one way):

    tables -> cells -> model / baselines -> factors (FactorSet) -> convert -> series / trend -> report

The public API mirrors the command line; see ``calib.fit`` and ``calib.FactorSet``.
"""

__version__ = "0.1.0"

__all__ = ["__version__", "fit", "FactorSet", "load_factors", "InputError"]


def __getattr__(name):
    # Lazy imports keep `calib --help` and `calib check` fast (no PyMC import).
    if name == "fit":
        from calib.fitting import fit

        return fit
    if name in ("FactorSet", "load_factors"):
        from calib import factors

        return getattr(factors, name)
    if name == "InputError":
        from calib.errors import InputError

        return InputError
    raise AttributeError(name)
