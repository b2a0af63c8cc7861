"""ngopt: natural-gradient optimization for PyTorch with Kronecker-factored Fisher curvature."""
from .optimizer import NaturalGradient

__all__ = ["NaturalGradient"]
__version__ = "0.1.0"
