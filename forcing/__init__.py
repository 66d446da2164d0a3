"""Large-scale forcing schemes behind one interface (`forcing.base`) and a registry."""
from eddybox.forcing import linear, ornstein_uhlenbeck, reinjection  # noqa: F401  (fill the registry)
from eddybox.forcing.base import FORCINGS, Forcing, make_forcing, register  # noqa: F401
