"""Source spaces (where sources are, who neighbours whom) and the time axis.

Format-free: file formats build these objects (:mod:`groupsrc.formats`);
statistics and outputs use them through the contract in :mod:`.base`.
"""

from .base import SourceSpace
from .surface import Hemisphere, SurfaceMesh
from .timeaxis import TimeAxis
from .volume import VolumeGrid

__all__ = ["Hemisphere", "SourceSpace", "SurfaceMesh", "TimeAxis", "VolumeGrid"]
