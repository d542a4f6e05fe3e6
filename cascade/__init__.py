"""cascade: acceptable-use categories for URLs, a URL model first and a page fetch where it pays."""

from cascade.errors import (
    CascadeError,
    InputFormatError,
    InvalidURL,
    ModelFileError,
    NotFittedError,
    TaxonomyError,
)

__version__ = "0.1.0"

__all__ = [
    "CascadeError",
    "InputFormatError",
    "InvalidURL",
    "ModelFileError",
    "NotFittedError",
    "TaxonomyError",
    "__version__",
]
