"""windowfinder: process windows with stated confidence from few, expensive, noisy runs."""

import os as _os

# The matrices here are small (tens to a few thousand runs); multi-threaded BLAS costs more in thread
# start-up than it gains and oversubscribes the cores a campaign's workers need. Respect a user's choice.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

__version__ = "0.1.0"

from windowfinder.errors import InputError  # noqa: E402
from windowfinder.inputs.spec import Factor, Response, StudySpec  # noqa: E402
from windowfinder.study import Study  # noqa: E402

__all__ = ["InputError", "Factor", "Response", "StudySpec", "Study", "__version__"]
