"""nenv: telephone-band to wideband speech extension by source-filter synthesis.

The embedding API (everything else may change between versions)::

    import nenv
    model = nenv.load_model()                 # the shipped model; or load_model("models/mine")
    call = nenv.CallEngine(model)             # one call: feed(x) -> ready 16 kHz samples, flush() at the end
    calls = nenv.MultiCallEngine(model)       # many calls: open(id), feed(id, x), step() -> {id: samples}, close(id)

Samples are floats at full scale 1.0 (8 kHz in, 16 kHz out); ``method=`` picks another system
('codebook', 'imaging', 'unextended'). The inference path (this package minus ``nenv.train``)
imports numpy, scipy, numba, soundfile and onnxruntime only; torch is needed for training and
export alone.
"""

__version__ = "0.1.0"
__all__ = ["CallEngine", "MultiCallEngine", "__version__", "load_model"]


def load_model(path=None):
    """A trained model folder, loaded (the shipped default model when ``path`` is None; ``$NENV_MODEL`` overrides it)."""
    from nenv.chain.systems import load_model as _load

    return _load(path)


def __getattr__(name: str):
    # the engines are imported on first use: 'nenv --version' and the training tools stay light
    if name == "CallEngine":
        from nenv.serve.runtime import CallEngine

        return CallEngine
    if name == "MultiCallEngine":
        from nenv.serve.multicall import MultiCallEngine

        return MultiCallEngine
    raise AttributeError(f"module 'nenv' has no attribute {name!r}")
