"""countscale: from a partial galaxy or star survey to statements about the whole.

Modules, one per domain noun (see DEVELOPERS.md for the map):

footprint
    Multi-order HEALPix coverage with exact-to-the-boundary area.
errors
    The project's input-error types (subclasses of ``ValueError``/``TypeError``).
"""

from countscale.errors import InputError, InputTypeError

__version__ = "0.1.0"

__all__ = ["InputError", "InputTypeError", "__version__"]
