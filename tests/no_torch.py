"""A preamble for subprocess scripts that makes torch look uninstalled, as on a plant machine.

A meta-path finder refuses ``torch`` before any other finder looks, so ``import torch`` fails with
ModuleNotFoundError and torch never appears in ``sys.modules`` (libraries such as SciPy probe
``sys.modules`` for torch, so a ``None`` entry there would not look like a machine without torch).
"""

BLOCK_TORCH = '''import sys
class _RefuseTorch:
    def find_spec(self, name, path=None, target=None):
        if name == "torch" or name.startswith("torch."):
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None
sys.meta_path.insert(0, _RefuseTorch())
'''
