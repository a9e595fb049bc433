"""Gaussian mocks on a mesh and the FFT multipole estimator (``ergofit simulate``)."""
