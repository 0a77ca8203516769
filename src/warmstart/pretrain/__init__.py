"""Pretraining: views (augment), methods (SimCLR, MoCo v2, BYOL ...), data and the training loop.

Importing this package imports torch.
"""
