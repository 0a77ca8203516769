"""Few-shot segmentation benchmark: random initialization against warm starts, on labelled data.

``settings``, ``data``, ``stats`` and ``report`` need no torch; ``train`` and ``run`` do.
"""
