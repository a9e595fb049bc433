"""Numerical building blocks with no physics of their own: Hankel transforms (FFTLog)."""
