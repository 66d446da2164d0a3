"""eddybox.solver: the fluid core (`fluid`), the run machinery (`run`), estimators of means and
error bars (`estimators`), the study tools (`study`) and the command line (`cli`).
See DEVELOPERS.md, "Architecture", for who may import whom."""
__version__ = "0.1.0"
import os as _os

# numba's OpenMP threads would otherwise spin after each parallel loop and starve FFTW's own
# threads on the same cores (measured: a 64^3 step 2x slower with 2 threads); set it before
# the OpenMP runtime loads
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
