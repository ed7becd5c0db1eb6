"""volrecon: calibrate single-shot 3-D microscopes and reconstruct their video as 4-D volumes.

Importing volrecon does nothing but define names: no files, threads or logging are touched.
Reconstructions are research images, not for diagnosis.
"""

from volrecon.models import Geometry, PSFModel
from volrecon.solvers import SolveInfo, reconstruct

__version__ = "0.1.0"

__all__ = ["Geometry", "PSFModel", "SolveInfo", "__version__", "reconstruct"]
