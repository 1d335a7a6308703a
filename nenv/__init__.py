"""nenv: telephone-band to wideband speech extension by source-filter synthesis.

The inference path (this package minus ``nenv.train``) imports numpy, scipy,
soundfile and onnxruntime only; torch is needed for training and export alone.
"""

__version__ = "0.1.0"
