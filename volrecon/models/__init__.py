"""PSF models: linear operators from a volume (Z, Y, X) to a sensor frame (Y, X)."""

from volrecon.models.base import Geometry, PSFModel
from volrecon.models.depth_convolution import DepthConvolutionPSF
from volrecon.models.field_varying import FieldVaryingPSF, interpolation_weights
from volrecon.models.low_rank import LowRankDepthPSF
from volrecon.models.store import load_model, save_model

__all__ = [
    "DepthConvolutionPSF",
    "FieldVaryingPSF",
    "Geometry",
    "LowRankDepthPSF",
    "PSFModel",
    "interpolation_weights",
    "load_model",
    "save_model",
]
