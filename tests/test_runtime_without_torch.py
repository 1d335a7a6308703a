"""The inference path must import and run with torch unavailable (a gateway installs no torch)."""

from __future__ import annotations

import subprocess
import sys

# torch is made unimportable by a meta-path finder, as if it were not installed. (Setting
# sys.modules["torch"] = None instead breaks scipy's array-API helpers, which look torch up there.)
CODE = """
import sys
class NoTorch:
    def find_spec(self, name, path=None, target=None):
        if name == "torch" or name.startswith("torch."):
            raise ImportError("torch is blocked in this test")
sys.meta_path.insert(0, NoTorch())
import numpy as np
import nenv.cli, nenv.chain.pipeline, nenv.report.evaluate
from nenv.chain import pipeline
y = pipeline.extend(np.random.default_rng(0).standard_normal(8000) * 0.05, system=pipeline.make_system("imaging")).y
assert y.shape == (16000,)
assert "torch" not in sys.modules
try:
    import torch
except ImportError:
    print("ok")
"""


def test_inference_path_imports_without_torch():
    res = subprocess.run([sys.executable, "-c", CODE], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "ok"
