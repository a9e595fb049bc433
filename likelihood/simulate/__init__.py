"""Gaussian mocks on a mesh (``ergofit simulate``): random fields (:mod:`.fields`), mock surveys
measured with the FFT estimator (:mod:`.mocks`) and their validation (:mod:`.validation`)."""
