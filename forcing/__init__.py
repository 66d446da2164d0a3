"""Large-scale forcing schemes behind one interface (`forcing.base`) and a registry."""
from .base import FORCINGS, Forcing, make_forcing, register  # noqa: F401
from . import linear, ornstein_uhlenbeck, reinjection  # noqa: F401  (fill the registry)
