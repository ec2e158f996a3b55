"""Force models: each with a numpy acceleration and a separately written CasADi one.

May import the models' own modules only.
"""

from .base import Body, ForceModel
from .cr3bp import CR3BP
from .earth_centred import EarthCentred
from .twobody import TwoBody

__all__ = ["Body", "ForceModel", "CR3BP", "EarthCentred", "TwoBody"]

from .factory import MODEL_KINDS, build_model  # noqa: E402

__all__ += ["MODEL_KINDS", "build_model"]
