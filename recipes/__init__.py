"""Small end-to-end training recipes for rvqlayer that run on a laptop CPU.

Run them with ``rvqlayer-recipe NAME`` (``python -m recipes.cli NAME``). The
recipes, their summaries and defaults are listed in one place,
:data:`recipes.registry.RECIPES`. They need the ``recipes`` extra
(pytorch-lightning, matplotlib, safetensors, tensorboard).
"""

from ._errors import RecipeInputError

__all__ = ["RecipeInputError"]
