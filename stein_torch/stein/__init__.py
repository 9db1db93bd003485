"""The Stein machinery: SVGD directions per kernel type and the kernel Stein discrepancy."""

from .directions import register_direction, svgd_direction
from .ksd import ksd
from .scratch import Scratch

__all__ = ["svgd_direction", "register_direction", "ksd", "Scratch"]
