"""PSF models: linear operators from a volume (Z, Y, X) to a sensor frame (Y, X)."""

from volrecon.models.base import Geometry, PSFModel
from volrecon.models.depth_convolution import DepthConvolutionPSF
from volrecon.models.field_varying import FieldVaryingPSF, interpolation_weights
from volrecon.models.low_rank import LowRankDepthPSF
from volrecon.models.periodic import LensletPSF
from volrecon.models.store import StoredModel, load_model, open_model_store, save_model

__all__ = [
    "DepthConvolutionPSF",
    "FieldVaryingPSF",
    "Geometry",
    "LensletPSF",
    "LowRankDepthPSF",
    "PSFModel",
    "StoredModel",
    "interpolation_weights",
    "load_model",
    "open_model_store",
    "save_model",
]
