"""The numerical core of the fluid: data layouts (serial, slab, pencil), FFT plans, spectral
kernels, the nonlinear term, time-stepping schemes, initial fields and fluid statistics.

It imports nothing of eddybox but itself and `eddybox.solver.errors`: no run machinery, no
particles, no study tools, no command line."""
