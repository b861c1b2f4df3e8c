"""Small end-to-end training recipes for rvqlayer that run on a laptop CPU.

Run them with ``rvqlayer-recipe NAME`` (``python -m recipes.cli NAME``):
``speech`` (a speech codec judged by PESQ and STOI, the main job), ``tones``
(synthetic audio codec), ``digits`` (8x8 images) and ``embeddings`` (a
quantizer fitted to pre-computed feature vectors). They need the ``recipes``
extra (pytorch-lightning, matplotlib, safetensors, tensorboard; for speech
also espeakng-loader, soundfile, scipy, pesq and pystoi).
"""
