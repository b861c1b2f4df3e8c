"""Code that makes `import torch` fail, prepended to subprocess scripts of the torch-free tests."""

TORCH_BLOCKER = """
import sys

class _NoTorch:
    def find_spec(self, name, path=None, target=None):
        if name == "torch" or name.startswith("torch."):
            raise ModuleNotFoundError("No module named 'torch' (blocked by the test)", name="torch")
        return None

sys.meta_path.insert(0, _NoTorch())
"""
