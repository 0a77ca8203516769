"""Self-supervised methods behind one interface (:class:`~.base.Method`); one small file each."""
from .base import METHODS, Method, build_method, register_method

from . import byol, moco, simclr  # noqa: E402,F401  (register the built-in methods)

__all__ = ["Method", "METHODS", "build_method", "register_method"]
