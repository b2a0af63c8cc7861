"""ngopt: natural-gradient optimization for PyTorch with Kronecker-factored Fisher curvature."""
from .diagnostics_log import log_diagnostics
from .fisher_probe import probe_fisher_quality
from .optimizer import FisherDescent

__all__ = ["FisherDescent", "log_diagnostics", "probe_fisher_quality"]
__version__ = "0.1.0"
