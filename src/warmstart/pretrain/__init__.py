"""Pretraining: views (augment), methods (SimCLR, MoCo v2, BYOL), data, monitors and the loop.

The package itself and its ``settings`` module import no torch (recipes read them); ``augment``,
``methods``, ``data``, ``monitors`` and ``loop`` do.
"""
