"""The curved-sky tests run BLAS single-threaded when nothing has loaded numpy yet: the
engine's per-order matrix products are small, and two OpenBLAS threads made them 5x slower
whenever another process kept a core busy (docs/curved_sky.md, speed and memory)."""
import os
import sys

if "numpy" not in sys.modules:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402  (after the BLAS setting above)
import pytest  # noqa: E402


class NoGrowth:
    """A cosmology with D(z) = 1 (an isotropic, unevolving field: the exact case of the
    configuration-space window convolution)."""

    def __init__(self, cosmo):
        self._c = cosmo

    def __getattr__(self, name):
        return getattr(self._c, name)

    def growth_factor(self, z, norm="today"):
        return np.ones_like(np.asarray(z, dtype=float))


@pytest.fixture(scope="session")
def no_growth():
    """The NoGrowth wrapper: ``no_growth(cosmo)``."""
    return NoGrowth


def window_convolution(cosmo, edges, window):
    """P̂_0, P̂_2 (2, n_bins) of the isotropic linear power P(k, z = 0) convolved with a
    geometry's window in configuration space (Wilson, Peacock, Taylor & de la Torre 2017;
    likelihood.observation.WindowMatrix, ic "none"): the exact answer for isotropic power."""
    import warnings

    from likelihood.observation.matrix import KBins, WindowMatrix, theory_k_grid
    kt = theory_k_grid()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wm = WindowMatrix(kt, (0,), KBins.from_edges(edges), (0, 2), window=window, ic="none",
                          cache=False)
    return wm.convolve_direct(cosmo.power(kt, 0)[None, :]).reshape(2, -1)


@pytest.fixture(scope="session")
def wilson_reference():
    """The window_convolution function: ``wilson_reference(cosmo, edges, window)``."""
    return window_convolution
