"""Small end-to-end training recipes for rvqlayer that run on a laptop CPU.

Run them with ``rvqlayer-recipe NAME`` (``python -m recipes.cli NAME``):
``tones`` (synthetic audio codec, the main job), ``digits`` (8x8 images) and
``embeddings`` (a quantizer fitted to pre-computed feature vectors). They need
the ``recipes`` extra (pytorch-lightning, matplotlib, safetensors, tensorboard).
"""
