"""ngopt: natural-gradient optimization for PyTorch with Kronecker-factored Fisher curvature."""
from .diagnostics_log import log_diagnostics
from .fisher_probe import probe_fisher_quality
from .optimizer import FisherDescent
from . import distributed  # noqa: F401  (DDP models then share their curvature by themselves)

__all__ = ["FisherDescent", "log_diagnostics", "probe_fisher_quality"]
__version__ = "0.1.0"
