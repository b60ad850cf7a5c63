"""driftscreen: is a microbial community's variation neutral drift plus immigration, or niche structure?"""

from driftscreen.dataset import Dataset, Design
from driftscreen.errors import InputError
from driftscreen.neutral.model import NeutralModel, NullFit

__version__ = "0.1.0"

__all__ = ["Dataset", "Design", "InputError", "NeutralModel", "NullFit", "__version__"]
