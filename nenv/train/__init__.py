"""Training: corpus survey, paired features, the MLP, the codebook, ONNX export.

Only ``model``, ``loop`` and ``export`` import torch (inside this package);
``recipe``, ``corpus`` and ``dataset`` are numpy/scipy only.
"""
