"""windowfinder: process windows with stated confidence from few, expensive, noisy runs."""

__version__ = "0.1.0"

from .errors import InputError  # noqa: E402
from .spec import Factor, Response, StudySpec  # noqa: E402
from .study import Study  # noqa: E402

__all__ = ["InputError", "Factor", "Response", "StudySpec", "Study", "__version__"]
