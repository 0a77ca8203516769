"""Self-supervised methods behind one interface (:class:`~.base.Method`); one small file each."""
from .base import METHODS, Method, Views, build_method, register_method

from . import byol, combined, dense, masked, moco, restore, simclr  # noqa: E402,F401  (register the built-in methods)

__all__ = ["Method", "METHODS", "Views", "build_method", "register_method"]
