"""eddybox solver: Fourier Navier-Stokes core, run loop, I/O and command line."""
__version__ = "0.1.0"
