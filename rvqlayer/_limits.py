"""Size bounds of a layer, shared by the layer, its file format and the stream format (no torch).

They keep a typo, a crafted file or a crafted stream from exhausting memory:
anything beyond them is refused with a message before it is allocated.
"""

MAX_DIM = 2**16
MAX_STAGES = 1024
MAX_ENTRIES = 2**20
MAX_CODEBOOK_VALUES = 2**29  # stages * entries * code_dim (4 GiB of float32 with the EMA sums)
