"""Numerical building blocks with no physics of their own: Hankel transforms (FFTLog), the
periodic mesh and its FFT conventions, Fourier-space filters."""
